package main

import (
	"bytes"
	"context"
	"strings"
	"testing"
)

// TestRefusesPlaintextOffLoopback: reckond on an address that is not
// loopback, without TLS, refuses to start unless -insecure says so; it
// refuses before it listens, so nothing opens on that address here.
func TestRefusesPlaintextOffLoopback(t *testing.T) {
	dir := t.TempDir()
	for _, args := range [][]string{
		{"-listen", "0.0.0.0:0", "-journal", dir},
		{"-listen", "127.0.0.1:0", "-metrics-listen", "0.0.0.0:0", "-journal", dir},
		{"-listen", "127.0.0.1:0", "-view", "0.0.0.0:0", "-journal", dir},
	} {
		var out, errb bytes.Buffer
		err := run(context.Background(), args, &out, &errb)
		if err == nil || !strings.Contains(err.Error(), "-insecure") {
			t.Errorf("%v: %v, want a refusal naming -insecure", args, err)
		}
	}
	var out, errb bytes.Buffer
	if err := run(context.Background(), []string{"-max-streams", "0"}, &out, &errb); err == nil || !strings.Contains(err.Error(), "max-streams") {
		t.Errorf("-max-streams 0: %v", err)
	}
}
