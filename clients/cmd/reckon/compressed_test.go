package main

import (
	"bytes"
	"compress/gzip"
	"context"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// TestGzipSamplesFile: a recording kept as a .jsonl.gz (RFC 1952) is
// taken by the commands that read samples files as the file itself is:
// replay writes the same track, review names its directory after the file
// without .jsonl.gz, and feed -create (which checks the file to its end,
// then reads it again) sends every sample. A copy cut short is refused at
// the line it ends in, naming the file and the decompression, by replay
// and by feed -create before it creates the robot. Before, each refused
// the file at line 1 as "invalid value", saying that its lines ended in a
// carriage return.
func TestGzipSamplesFile(t *testing.T) {
	plain, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	zw := gzip.NewWriter(&buf)
	zw.Write(plain)
	if err := zw.Close(); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	gz := filepath.Join(dir, "greenhouse.jsonl.gz")
	cut := filepath.Join(dir, "cut.jsonl.gz")
	if err := os.WriteFile(gz, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(cut, buf.Bytes()[:buf.Len()/2], 0o644); err != nil {
		t.Fatal(err)
	}
	want, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", exampleSamples)
	if err != nil {
		t.Fatalf("replay of the file: %v\n%s", err, errs)
	}
	got, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", gz)
	if err != nil || got != want || strings.Count(got, "\n") < 500 {
		t.Errorf("replay of the file gzip-compressed: %v, %d bytes of output (%d of the file's)\n%s", err, len(got), len(want), errs)
	}
	_, errs, code := runCode(t, context.Background(), "", "replay", "-config", exampleConfig, "-samples", cut)
	if code != exitRefused || !strings.Contains(errs, cut+": JSON Lines: line ") || !strings.Contains(errs, "gzip") {
		t.Errorf("replay of a gzip file cut short: exit %d, want %d naming the file, a line and gzip\n%s", code, exitRefused, errs)
	}

	config, err := filepath.Abs(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	t.Chdir(dir)
	if _, errs, err := runCmd(t, "review", "-config", config, "-samples", gz); err != nil {
		t.Fatalf("review: %v\n%s", err, errs)
	}
	if _, err := os.Stat(filepath.Join("review-greenhouse", "report.html")); err != nil {
		t.Errorf("review of greenhouse.jsonl.gz: %v; want its report in review-greenhouse/", err)
	}

	addr, stop := serve(t, "127.0.0.1:0", t.TempDir())
	defer stop()
	_, errs, code = runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", config, cut)
	if code != exitRefused || !strings.Contains(errs, cut+":") || !strings.Contains(errs, "gzip") {
		t.Errorf("feed -create of a gzip file cut short: exit %d, want %d naming the file and gzip\n%s", code, exitRefused, errs)
	}
	if _, _, code := runCode(t, context.Background(), "", "pose", "-addr", addr, "cart"); code != exitNotFound {
		t.Errorf("after feed -create of a gzip file cut short: pose exit %d, want %d (no robot created)", code, exitNotFound)
	}
	out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", config, gz)
	n := strings.Count(string(plain), "\n{")
	if code != exitOK || !strings.Contains(out, strconv.Itoa(n)+" samples sent") {
		t.Errorf("feed -create of the gzip file: exit %d, want %d samples sent\n%s%s", code, n, out, errs)
	}
}
