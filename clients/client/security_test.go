package client

import (
	"errors"
	"strings"
	"testing"
)

// TestIsLoopback: the addresses a token may travel to in plain text.
func TestIsLoopback(t *testing.T) {
	cases := []struct {
		addr string
		want bool
	}{
		{"127.0.0.1:7460", true},
		{"127.3.2.1:7460", true},
		{"[::1]:7460", true},
		{"localhost:7460", true},
		{"dns:///localhost:7460", true},
		{"unix:///run/reckon.sock", true},
		{"0.0.0.0:7460", false},
		{"10.0.0.5:7460", false},
		{"[2001:db8::1]:7460", false},
		{"cart-7.greenhouse.lan:7460", false},
		{"dns:///cart-7.greenhouse.lan:7460", false},
		{"localhost.evil.example:7460", false},
	}
	for _, c := range cases {
		if got := IsLoopback(c.addr); got != c.want {
			t.Errorf("IsLoopback(%q) = %v, want %v", c.addr, got, c.want)
		}
	}
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
