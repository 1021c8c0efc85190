package server

import (
	"context"
	"io"
	"os"
	"path/filepath"
	"testing"
	"time"

	"reckon.example/server/journal"
)

// TestPacedReads: a pacedFS reads a file in reads of at most 1 MiB and
// waits between them as the rate asks: 8 MiB at 2 MiB/s are due over 4 s,
// so the waits (on a clock of the test's, which the waits move) add up to
// the 3.5 s after the first read. The end of its context ends the reads.
func TestPacedReads(t *testing.T) {
	dir := t.TempDir()
	name := filepath.Join(dir, "seg")
	if err := os.WriteFile(name, make([]byte, 8<<20), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	p := newPacedFS(ctx, journal.OS, 2<<20)
	clock := time.Unix(0, 0)
	var slept time.Duration
	p.now = func() time.Time { return clock }
	p.sleep = func(_ context.Context, d time.Duration) { slept += d; clock = clock.Add(d) }
	f, err := p.OpenFile(name, os.O_RDONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	buf := make([]byte, 8<<20)
	reads := 0
	for off := 0; off < len(buf); {
		n, err := f.Read(buf[off:])
		if err != nil {
			t.Fatal(err)
		}
		if n > pacedChunk {
			t.Fatalf("read %d bytes at once", n)
		}
		off += n
		reads++
	}
	if want := 3500 * time.Millisecond; slept != want || reads != 8 {
		t.Errorf("%d reads, waits %v; want 8 reads and waits %v", reads, slept, want)
	}
	cancel()
	if _, err := f.Read(buf); err == nil || err == io.EOF {
		t.Errorf("a read after the end of the context: %v", err)
	}
}
