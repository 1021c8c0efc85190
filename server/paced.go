package server

import (
	"context"
	"os"
	"time"

	"reckon.example/server/journal"
)

// DefaultVerifyBytesPerSecond is the rate at which VerifyHistories reads
// the journal history that restore did not read, unless told otherwise
// (32 MiB/s). Read at the disk's full speed, a history of gigabytes kept
// an SD card or eMMC (20 to 90 MB/s) busy for minutes after a start, and
// the journal's own writes and syncs, which every verdict waits on, queued
// behind it (common practice: background scrubs of storage systems are
// rate limited).
const DefaultVerifyBytesPerSecond = 32 << 20

// pacedFS reads through fs at most rate bytes a second on average, each
// read at most pacedChunk bytes, sleeping (sleep) between reads as the
// rate needs; the end of ctx ends the sleeps and the reads. It only reads:
// VerifyHistories' scans write nothing.
type pacedFS struct {
	journal.FS
	ctx   context.Context
	rate  float64 // bytes a second
	sleep func(ctx context.Context, d time.Duration)
	// start is when the first read began; read the bytes read since.
	start time.Time
	read  int64
	now   func() time.Time
}

// pacedChunk bounds one read of a pacedFS, so that the rate holds over
// short stretches too (a scan reads a segment of up to 512 MiB at once).
const pacedChunk = 1 << 20

func newPacedFS(ctx context.Context, fs journal.FS, rate int64) *pacedFS {
	return &pacedFS{FS: fs, ctx: ctx, rate: float64(rate), sleep: sleepCtx, now: time.Now}
}

func sleepCtx(ctx context.Context, d time.Duration) {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
	case <-ctx.Done():
	}
}

func (p *pacedFS) OpenFile(name string, flag int, perm os.FileMode) (journal.File, error) {
	f, err := p.FS.OpenFile(name, flag, perm)
	if err != nil {
		return nil, err
	}
	return &pacedFile{File: f, p: p}, nil
}

type pacedFile struct {
	journal.File
	p *pacedFS
}

func (f *pacedFile) Read(b []byte) (int, error) {
	p := f.p
	if err := p.ctx.Err(); err != nil {
		return 0, err
	}
	if p.start.IsZero() {
		p.start = p.now()
	}
	// Wait until the bytes read so far are due at the rate.
	if due := time.Duration(float64(p.read) / p.rate * float64(time.Second)); due > 0 {
		if d := due - p.now().Sub(p.start); d > 0 {
			p.sleep(p.ctx, d)
			if err := p.ctx.Err(); err != nil {
				return 0, err
			}
		}
	}
	n, err := f.File.Read(b[:min(len(b), pacedChunk)])
	p.read += int64(n)
	return n, err
}
