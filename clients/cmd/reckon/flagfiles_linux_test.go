package main

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestFlagFilesNotRegular: reckon's own flag files (-token-file, -tls-ca,
// -tls-cert and -tls-key, a robot's -config) that are a named pipe no
// process writes to, a directory or a device are refused at once, naming
// the flag or file and what it is, as reckond's are (server/cmd/reckond's
// TestFlagFilesNotRegular). Before, a named pipe with no writer held the
// command for ever (open(2) waits for a writer) and /dev/zero was read
// without end.
func TestFlagFilesNotRegular(t *testing.T) {
	dir := t.TempDir()
	fifo := filepath.Join(dir, "fifo")
	if err := syscall.Mkfifo(fifo, 0o600); err != nil {
		t.Skipf("mkfifo: %v", err)
	}
	ca := filepath.Join(dir, "ca.pem")
	writeTestCA(t, ca)
	addr := "127.0.0.1:1" // nothing is dialled before the files are read
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"robots", "-addr", addr, "-token-file", fifo}, "token-file: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"robots", "-addr", addr, "-token-file", "/dev/zero"}, "token-file: /dev/zero is a character device"},
		{[]string{"robots", "-addr", addr, "-tls-ca", fifo}, "tls-ca: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"robots", "-addr", addr, "-tls-ca", dir}, "tls-ca: " + dir + " is a directory"},
		{[]string{"robots", "-addr", addr, "-tls-ca", ca, "-tls-cert", fifo, "-tls-key", fifo}, "tls-cert: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"create", "cart", "-addr", addr, "-config", fifo}, fifo + " is a named pipe that no process writes to"},
		{[]string{"create", "cart", "-addr", addr, "-config", "/dev/zero"}, "/dev/zero is a character device"},
	}
	for _, c := range cases {
		done := make(chan error, 1)
		go func() {
			done <- run(context.Background(), c.args, strings.NewReader(""), &bytes.Buffer{}, &bytes.Buffer{})
		}()
		var err error
		select {
		case err = <-done:
		case <-time.After(30 * time.Second): // a bound on a hang, not a timing check
			t.Errorf("%v: still waiting for the file after 30 s", c.args)
			// Let the old build's opens go on: a writer that closes at
			// once gives each end of file.
			for err == nil {
				if w, werr := os.OpenFile(fifo, os.O_WRONLY|syscall.O_NONBLOCK, 0); werr == nil {
					w.Close()
				}
				select {
				case err = <-done:
				case <-time.After(10 * time.Millisecond):
				}
			}
		}
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%v: %v, want an error with %q", c.args, err, c.want)
		}
	}
}

// writeTestCA writes a self-signed certificate, PEM-encoded, to path.
func writeTestCA(t *testing.T, path string) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "greenhouse test CA"}, NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour), IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
}
