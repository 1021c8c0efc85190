package bridge

import (
	"bytes"
	"os/exec"
	"path/filepath"
	"testing"
)

// TestCEncoder compiles the reference encoder's host test with gcc, which
// checks the CRC-32C and COBS check values in C and writes a fixed
// sequence of frames; the Go decoder must turn them into the expected
// samples. The sequence (see c/reckon_link_test.c): frame k of 40 has boot
// 3, counter 2^32-5+k (wraps), stamp 2^32-100000+10000k microseconds,
// counts 2^31-500+185k (wraps int32), 215k and -10k, and on even k the
// heading float32(0.003125k) radians.
func TestCEncoder(t *testing.T) {
	gcc, err := exec.LookPath("gcc")
	if err != nil {
		t.Skip("gcc not found: the C reference encoder is not tested (CI installs gcc)")
	}
	bin := filepath.Join(t.TempDir(), "reckon_link_test")
	cmd := exec.Command(gcc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2", "-o", bin, "reckon_link_test.c")
	cmd.Dir = "c"
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("gcc: %v\n%s", err, out)
	}
	var stdout, stderr bytes.Buffer
	run := exec.Command(bin)
	run.Stdout, run.Stderr = &stdout, &stderr
	if err := run.Run(); err != nil {
		t.Fatalf("the C test failed: %v\n%s", err, stderr.String())
	}
	var want []sampleOf
	for k := range int64(40) {
		h := -100.0
		if k%2 == 0 {
			h = float64(float32(0.003125 * float64(k)))
		}
		want = append(want, sampleOf{(1<<32 - 100000 + 10000*k) * 1000, []int64{1<<31 - 500 + 185*k, 215 * k, -10 * k}, h})
	}
	var d Decoder
	got := shorts(d.Decode(nil, stdout.Bytes()))
	if !sameSamples(got, want) {
		t.Errorf("samples from the C encoder:\n got %v\nwant %v", got, want)
	}
	if st := d.Stats(); st != (Stats{Frames: 40, Samples: 40}) {
		t.Errorf("stats %+v, want 40 clean frames", st)
	}
	// The Go encoder writes the very same bytes.
	var goBytes []byte
	for k := range uint32(40) {
		f := wheels(3, 1<<32-5+k, 1<<32-100000+10000*uint64(k), int32(uint32(1<<31-500+185*k)), int32(215*k), -int32(10*k))
		if k%2 == 0 {
			f.HasHeading, f.HeadingRad = true, float32(0.003125*float64(k))
		}
		goBytes = AppendFrame(goBytes, &f, nil)
	}
	if !bytes.Equal(goBytes, stdout.Bytes()) {
		t.Errorf("the Go and C encoders differ")
	}
}
