package client

import (
	"errors"
	"os"
	"strconv"
	"strings"
	"testing"
)

// TestIsLoopback: the targets a token may travel to in plain text, from
// testdata/reference/loopback-targets.tsv, the table the Python client's
// is_loopback is tested against too (test_samples.py), so that both
// accept the same forms.
func TestIsLoopback(t *testing.T) {
	for _, c := range loopbackTargets(t) {
		if got := IsLoopback(c.target); got != c.want {
			t.Errorf("IsLoopback(%q) = %v, want %v", c.target, got, c.want)
		}
	}
}

// loopbackTargets reads the shared table of targets: one a line, a tab,
// then true or false; lines starting with # are comments.
func loopbackTargets(t *testing.T) []struct {
	target string
	want   bool
} {
	t.Helper()
	b, err := os.ReadFile("../../testdata/reference/loopback-targets.tsv")
	if err != nil {
		t.Fatal(err)
	}
	var out []struct {
		target string
		want   bool
	}
	for i, line := range strings.Split(strings.TrimSpace(string(b)), "\n") {
		if strings.HasPrefix(line, "#") {
			continue
		}
		target, want, ok := strings.Cut(line, "\t")
		w, err := strconv.ParseBool(want)
		if !ok || err != nil {
			t.Fatalf("loopback-targets.tsv:%d: %q is not TARGET<tab>true|false", i+1, line)
		}
		out = append(out, struct {
			target string
			want   bool
		}{target, w})
	}
	if len(out) < 20 {
		t.Fatalf("loopback-targets.tsv: %d targets, want the whole table", len(out))
	}
	return out
}

// TestDialRefusesPlaintextToken: a token without TLS to an address that is
// not loopback is refused before any connection, naming the address; to
// loopback, or without a token, Dial goes ahead (it connects lazily, so no
// traffic leaves the machine here).
func TestDialRefusesPlaintextToken(t *testing.T) {
	_, err := Dial("10.0.0.5:7460", Options{Token: "greenhouse-7"})
	if !errors.Is(err, ErrPlaintextToken) || !strings.Contains(err.Error(), "10.0.0.5:7460") {
		t.Errorf("Dial with a plain-text token to 10.0.0.5: %v, want ErrPlaintextToken naming the address", err)
	}
	for _, ok := range []struct {
		addr string
		opt  Options
	}{{"127.0.0.1:7460", Options{Token: "greenhouse-7"}}, {"10.0.0.5:7460", Options{}}} {
		c, err := Dial(ok.addr, ok.opt)
		if err != nil {
			t.Errorf("Dial(%s, token %t): %v", ok.addr, ok.opt.Token != "", err)
			continue
		}
		c.Close()
	}
}
