package main

import (
	"bytes"
	"context"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// TestDemo runs the demo as a user would and checks that it reports a
// sensible estimate: small error, the move recovered, every fix decided.
func TestDemo(t *testing.T) {
	for _, layout := range []string{"two-parallel-one-lateral", "parallel-lateral-imu", "differential"} {
		t.Run(layout, func(t *testing.T) {
			var out, errb bytes.Buffer
			if err := run(context.Background(), []string{"demo", "-layout", layout, "-duration", "70"}, &out, &errb); err != nil {
				t.Fatalf("demo: %v\n%s", err, errb.String())
			}
			s := out.String()
			m := regexp.MustCompile(`RMS position error against truth: ([0-9.]+) m`).FindStringSubmatch(s)
			if m == nil {
				t.Fatalf("no RMS line in\n%s", s)
			}
			if rms, _ := strconv.ParseFloat(m[1], 64); rms > 0.25 {
				t.Errorf("RMS error %.3f m", rms)
			}
			for _, want := range []string{"move-recovered", "fix gated", "sensor camera"} {
				if !strings.Contains(s, want) {
					t.Errorf("output lacks %q:\n%s", want, s)
				}
			}
		})
	}
}

func TestUnknownCommand(t *testing.T) {
	var out, errb bytes.Buffer
	if err := run(context.Background(), []string{"fly"}, &out, &errb); err == nil || !strings.Contains(errb.String(), "usage") {
		t.Errorf("unknown command: err %v, stderr %q", err, errb.String())
	}
	if err := run(context.Background(), []string{"demo", "-layout", "tricycle"}, &out, &errb); err == nil {
		t.Errorf("unknown layout accepted")
	}
}
