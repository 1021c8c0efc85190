package daemon

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// pki is a CA with certificates it signed, written as PEM files.
type pki struct {
	dir    string
	ca     *x509.Certificate
	caKey  *ecdsa.PrivateKey
	caPool *x509.CertPool
}

func newPKI(t *testing.T, name string) *pki {
	key, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: name}, NotBefore: time.Now().Add(-time.Hour),
		NotAfter: time.Now().Add(time.Hour), IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	ca, _ := x509.ParseCertificate(der)
	p := &pki{dir: t.TempDir(), ca: ca, caKey: key, caPool: x509.NewCertPool()}
	p.caPool.AddCert(ca)
	writePEM(t, filepath.Join(p.dir, "ca.pem"), "CERTIFICATE", der)
	return p
}

func writePEM(t *testing.T, path, typ string, der []byte) {
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
}

// issue writes name.pem and name-key.pem signed by the CA.
func (p *pki) issue(t *testing.T, name string, server bool) (cert, key string) {
	k, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(time.Now().UnixNano()), Subject: pkix.Name{CommonName: name},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour), KeyUsage: x509.KeyUsageDigitalSignature}
	if server {
		tmpl.ExtKeyUsage = []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}
		tmpl.IPAddresses = []net.IP{net.ParseIP("127.0.0.1")}
	} else {
		tmpl.ExtKeyUsage = []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth}
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, p.ca, &k.PublicKey, p.caKey)
	if err != nil {
		t.Fatal(err)
	}
	kd, _ := x509.MarshalECPrivateKey(k)
	cert, key = filepath.Join(p.dir, name+".pem"), filepath.Join(p.dir, name+"-key.pem")
	writePEM(t, cert, "CERTIFICATE", der)
	writePEM(t, key, "EC PRIVATE KEY", kd)
	return cert, key
}

// tryCall lists the robots (there are none yet) over a new connection.
func tryCall(t *testing.T, addr string, tc *tls.Config, token string) error {
	c := dial(t, addr, tc, token)
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	_, err := c.ListRobots(ctx, &pb.ListRobotsRequest{})
	return err
}

func TestTLSAndToken(t *testing.T) {
	p := newPKI(t, "reckon test CA")
	cert, key := p.issue(t, "reckond", true)
	srv := start(t, Config{TLSCert: cert, TLSKey: key, Token: "greenhouse-7", Options: server.Options{JournalDir: t.TempDir(), SyncEach: true}})
	defer srv.stop()
	tc := &tls.Config{RootCAs: p.caPool, MinVersion: tls.VersionTLS12}
	if err := tryCall(t, srv.addr, tc, "greenhouse-7"); err != nil {
		t.Fatalf("TLS with the token: %v", err)
	}
	if err := tryCall(t, srv.addr, tc, ""); status.Code(err) != codes.Unauthenticated {
		t.Errorf("no token: %v", err)
	}
	if err := tryCall(t, srv.addr, tc, "guess"); status.Code(err) != codes.Unauthenticated {
		t.Errorf("wrong token: %v", err)
	}
	if err := tryCall(t, srv.addr, nil, "greenhouse-7"); status.Code(err) != codes.Unavailable {
		t.Errorf("plain text to a TLS server: %v", err)
	}
	other := newPKI(t, "some other CA")
	if err := tryCall(t, srv.addr, &tls.Config{RootCAs: other.caPool}, "greenhouse-7"); status.Code(err) != codes.Unavailable {
		t.Errorf("server certificate from an unknown CA: %v", err)
	}
	// A stream needs the token too, and works with it (fsync on each).
	c := dial(t, srv.addr, tc, "greenhouse-7")
	samp, cfg := samples(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 2, DurationS: 0.2})
	ctx := context.Background()
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	st, err := c.Ingest(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for i, s := range samp {
		seq := uint64(i + 1)
		if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: seq, Sample: s}); err != nil {
			t.Fatal(err)
		}
		if resp, err := st.Recv(); err != nil {
			t.Fatal(err)
		} else if resp.GetClientSequence() != seq {
			t.Fatalf("verdict for client sequence %d, want %d", resp.GetClientSequence(), seq)
		}
	}
	st.CloseSend()
	for _, err := st.Recv(); err == nil; _, err = st.Recv() { // until io.EOF: every verdict is in
	}
}

func TestMutualTLS(t *testing.T) {
	p := newPKI(t, "reckon test CA")
	cert, key := p.issue(t, "reckond", true)
	ccert, ckey := p.issue(t, "vision-process", false)
	srv := start(t, Config{TLSCert: cert, TLSKey: key, TLSClientCA: filepath.Join(p.dir, "ca.pem")})
	defer srv.stop()
	pair, err := tls.LoadX509KeyPair(ccert, ckey)
	if err != nil {
		t.Fatal(err)
	}
	if err := tryCall(t, srv.addr, &tls.Config{RootCAs: p.caPool, Certificates: []tls.Certificate{pair}}, ""); err != nil {
		t.Fatalf("with a client certificate: %v", err)
	}
	if err := tryCall(t, srv.addr, &tls.Config{RootCAs: p.caPool}, ""); err == nil {
		t.Errorf("a client without a certificate was let in")
	}
	rogue := newPKI(t, "rogue CA")
	rc, rk := rogue.issue(t, "intruder", false)
	rpair, _ := tls.LoadX509KeyPair(rc, rk)
	if err := tryCall(t, srv.addr, &tls.Config{RootCAs: p.caPool, Certificates: []tls.Certificate{rpair}}, ""); err == nil {
		t.Errorf("a client with a certificate from another CA was let in")
	}
}
