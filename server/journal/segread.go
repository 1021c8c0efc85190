package journal

import (
	"errors"
	"io"
	"os"
)

// segmentReader reads a segment file into one buffer a piece at a time,
// so that the scan of its first records (and the replay behind it) starts
// before the whole segment is read: a segment of 64 MiB took a tenth of a
// second to read, during which a replay waited.
type segmentReader struct {
	f    File
	b    []byte // what was read; its capacity holds the whole file
	full bool   // the whole file is in b
	err  error
}

// segmentPiece is the first piece read; each next doubles what was read
// (a variable for the tests).
var segmentPiece = 1 << 20

// openSegment opens a segment and reads its first piece into buf (when it
// fits in its capacity) or into a new buffer.
func openSegment(fsys FS, name string, buf []byte) (*segmentReader, error) {
	f, err := fsys.OpenFile(name, os.O_RDONLY, 0)
	if err != nil {
		return nil, err
	}
	size := 0
	if fi, err := f.Stat(); err == nil && fi.Size() > 0 {
		size = int(fi.Size())
	}
	r := &segmentReader{f: f, b: buf[:0]}
	if cap(r.b) < size+1 {
		r.b = make([]byte, 0, size+1) // +1: EOF seen without growing
	}
	if err := r.more(segmentPiece); err != nil {
		f.Close()
		return nil, err
	}
	return r, nil
}

// more reads at least n more bytes, or to the end of the file.
func (r *segmentReader) more(n int) error {
	for want := len(r.b) + n; !r.full && len(r.b) < want; {
		if len(r.b) == cap(r.b) {
			r.b = append(r.b, 0)[:len(r.b)] // the file grew since its size was read
		}
		m, err := r.f.Read(r.b[len(r.b):min(cap(r.b), want)])
		r.b = r.b[:len(r.b)+m]
		if errors.Is(err, io.EOF) {
			r.full = true
		} else if err != nil {
			return err
		}
	}
	return nil
}

// next reads the next piece, twice the size of what was read.
func (r *segmentReader) next() error { return r.more(max(len(r.b), segmentPiece)) }

// all reads the rest of the file.
func (r *segmentReader) all() error {
	for !r.full {
		if err := r.next(); err != nil {
			return err
		}
	}
	return nil
}

func (r *segmentReader) close() error { return r.f.Close() }
