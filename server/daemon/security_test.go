package daemon

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"log/slog"
	"math/big"
	"strings"
	"testing"
	"time"
)

// TestLoopbackAddr: which listen addresses bind this machine only.
func TestLoopbackAddr(t *testing.T) {
	cases := []struct {
		addr string
		want bool
	}{
		{"127.0.0.1:7460", true},
		{"127.0.0.1:0", true},
		{"[::1]:7460", true},
		{"localhost:7460", true},
		{":7460", false},
		{"0.0.0.0:7460", false},
		{"[::]:7460", false},
		{"192.168.4.20:7460", false},
		{"greenhouse-gw:7460", false},
		{"no-port", false},
	}
	for _, c := range cases {
		if got := loopbackAddr(c.addr); got != c.want {
			t.Errorf("loopbackAddr(%q) = %v, want %v", c.addr, got, c.want)
		}
	}
}

// TestServeRefusesPlaintextOffLoopback: Serve refuses a listener that is
// not loopback without TLS, and a metrics listener that is not loopback,
// unless told Insecure; it checks before it listens, so no socket opens on
// those addresses here.
func TestServeRefusesPlaintextOffLoopback(t *testing.T) {
	cases := []struct {
		dc   Config
		want string // "" = allowed
	}{
		{Config{Listen: "0.0.0.0:7460"}, "-insecure"},
		{Config{Listen: ":7460"}, "-tls-cert"},
		{Config{Listen: "0.0.0.0:7460", Insecure: true}, ""},
		{Config{Listen: "0.0.0.0:7460", TLSCert: "c.pem", TLSKey: "k.pem"}, ""},
		{Config{Listen: "127.0.0.1:7460", MetricsListen: "0.0.0.0:9464"}, "metrics-listen"},
		{Config{Listen: "127.0.0.1:7460", MetricsListen: "0.0.0.0:9464", Insecure: true}, ""},
		{Config{Listen: "127.0.0.1:7460", MetricsListen: ":9464"}, ""},
		// The live view shows where the robots are: off loopback it needs
		// TLS and a token (or client certificates), or -insecure.
		{Config{Listen: "127.0.0.1:7460", ViewListen: "127.0.0.1:7470"}, ""},
		{Config{Listen: "127.0.0.1:7460", ViewListen: ":7470"}, ""},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470"}, "-insecure"},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470", Token: "t"}, "-tls-cert"},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470", TLSCert: "c.pem", TLSKey: "k.pem"}, "-token-file"},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470", TLSCert: "c.pem", TLSKey: "k.pem", Token: "t"}, ""},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470", TLSCert: "c.pem", TLSKey: "k.pem", TLSClientCA: "ca.pem"}, ""},
		{Config{Listen: "127.0.0.1:7460", ViewListen: "0.0.0.0:7470", Insecure: true}, ""},
	}
	for _, c := range cases {
		dc := c.dc
		err := checkExposure(&dc)
		switch {
		case c.want == "" && err != nil:
			t.Errorf("%+v: %v", c.dc, err)
		case c.want != "" && (err == nil || !strings.Contains(err.Error(), c.want)):
			t.Errorf("%+v: error %v, want one naming %s", c.dc, err, c.want)
		}
	}
	dc := Config{Listen: "127.0.0.1:7460", MetricsListen: ":9464"}
	checkExposure(&dc)
	if dc.MetricsListen != "127.0.0.1:9464" {
		t.Errorf("metrics address without a host became %q, want loopback", dc.MetricsListen)
	}
	dc = Config{Listen: "127.0.0.1:7460", ViewListen: ":7470"}
	checkExposure(&dc)
	if dc.ViewListen != "127.0.0.1:7470" {
		t.Errorf("view address without a host became %q, want loopback", dc.ViewListen)
	}
	if err := Serve(context.Background(), Config{Listen: "0.0.0.0:0"}); err == nil || !strings.Contains(err.Error(), "not a loopback address") {
		t.Errorf("Serve on 0.0.0.0 in plain text: %v", err)
	}
}

// TestCertExpiryLogged: a server certificate past its end, or within 30
// days of it, is logged at start; one with a year left is not.
func TestCertExpiryLogged(t *testing.T) {
	now := time.Now()
	cert := func(notAfter time.Time) tls.Certificate {
		k, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "greenhouse-gw"}, NotBefore: now.Add(-time.Hour), NotAfter: notAfter}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &k.PublicKey, k)
		if err != nil {
			t.Fatal(err)
		}
		return tls.Certificate{Certificate: [][]byte{der}, PrivateKey: k}
	}
	cases := []struct {
		notAfter time.Time
		want     string
	}{
		{now.Add(-time.Hour), "has expired"},
		{now.Add(10 * 24 * time.Hour), "expires soon"},
		{now.Add(365 * 24 * time.Hour), ""},
	}
	for _, c := range cases {
		var buf bytes.Buffer
		logCertExpiry(slog.New(slog.NewTextHandler(&buf, nil)), &tls.Config{Certificates: []tls.Certificate{cert(c.notAfter)}}, now)
		if got := buf.String(); c.want == "" && got != "" || !strings.Contains(got, c.want) {
			t.Errorf("certificate ending %v: logged %q, want %q", c.notAfter, got, c.want)
		}
	}
}
