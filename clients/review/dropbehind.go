package review

import "os"

// dropBehind writes a file that nothing reads back soon (an export) and,
// where the system allows it, keeps little of it in the page cache: every
// dropChunk bytes it starts the writeback of the chunk just written, and
// drops from the cache what lies more than dropLag bytes behind, which
// the disk has written by then. It never waits for the disk: a chunk not
// yet written back stays cached. On this virtual machine a page the
// system has not used for a few seconds costs about 10 us to fill (the
// host backs it again), so a 180 MB export written the usual way cost 0.45
// s of CPU in the kernel; written so it takes the same few megabytes of
// pages over and over, about a fifth of that.
type dropBehind struct {
	f       *os.File
	off     int64 // bytes written
	started int64 // writeback started up to here
	dropped int64 // dropped from the cache up to here
}

const (
	dropChunk = 8 << 20
	dropLag   = 24 << 20
)

func newDropBehind(f *os.File) *dropBehind { return &dropBehind{f: f} }

func (d *dropBehind) Write(b []byte) (int, error) {
	n, err := d.f.Write(b)
	d.off += int64(n)
	if d.off-d.started >= dropChunk {
		startWriteback(d.f, d.started, d.off-d.started)
		d.started = d.off
		if end := d.started - dropLag; end > d.dropped {
			dropCached(d.f, d.dropped, end-d.dropped)
			d.dropped = end
		}
	}
	return n, err
}
