package journal

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
)

// segmentReader reads a segment file into one buffer a piece at a time,
// so that the scan of its first records (and the replay behind it) starts
// before the whole segment is read: a segment of 64 MiB took a tenth of a
// second to read, during which a replay waited.
type segmentReader struct {
	f    File
	b    []byte // what was read; its capacity holds the whole file (up to maxSegmentRead)
	full bool   // the whole file is in b, but for zeros zeros at its end
	// zeros counts the zero bytes at the end of a file past maxSegmentRead
	// that are not in b (rest).
	zeros int64
	size  int64 // the file's size when opened
	err   error
}

// maxSegmentRead bounds what a scan reads of a segment into memory: a
// file past it is read to its records' end, and the rest only checked for
// zeros (rest). The writer's segments are -segment-bytes (64 MiB by
// default) plus a batch and its reserve; a file of gigabytes of zeros (a
// sparse file, a copy gone wrong) took the restore to 5 GB of memory and
// a minute before the service served any robot. A variable for the tests.
var maxSegmentRead int64 = 1 << 30

// segmentPiece is the first piece read; each next doubles what was read
// (a variable for the tests).
var segmentPiece = 1 << 20

// openSegment opens a segment and reads its first piece from byte from
// into buf (when it fits in its capacity) or into a new buffer, at the
// same offset as in the file: the first from bytes of the buffer are not
// read (skip).
func openSegment(fsys FS, name string, buf []byte, from int64) (*segmentReader, error) {
	f, err := fsys.OpenFile(name, os.O_RDONLY, 0)
	if err != nil {
		return nil, err
	}
	var size int64
	if fi, err := f.Stat(); err == nil && fi.Size() > 0 {
		size = fi.Size()
	}
	r := &segmentReader{f: f, b: buf[:0], size: size}
	if want := min(size, maxSegmentRead) + 1; int64(cap(r.b)) < want {
		r.b = make([]byte, 0, want) // +1: EOF seen without growing
	}
	if from > 0 {
		if from > min(size, maxSegmentRead) {
			f.Close()
			return nil, fmt.Errorf("%s: %d bytes, the scan was to start at byte %d", name, size, from)
		}
		if err := skip(f, from); err != nil {
			f.Close()
			return nil, err
		}
		r.b = r.b[:from]
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

// rest reads the rest of the file as all does, unless the file is past
// maxSegmentRead: then it reads the rest a piece at a time without keeping
// it, and counts it in zeros if it is all zeros, or returns
// ErrSegmentTooLarge if it is not, naming good, where the segment's
// records end.
func (r *segmentReader) rest(path string, good int) error {
	if r.size <= maxSegmentRead {
		return r.all()
	}
	piece := make([]byte, segmentPiece)
	at := int64(len(r.b))
	for !r.full {
		m, err := r.f.Read(piece)
		if !allZero(piece[:m]) {
			return fmt.Errorf("%w: %s is %d bytes, past the %d a scan reads, and not zeros past byte %d; the records before it end at byte %d: if what follows is none of the journal's, cut the file there (truncate -s %d) and restart, or delete the robot (its journal is set aside as it is)",
				ErrSegmentTooLarge, path, r.size, maxSegmentRead, at+int64(bytes.IndexFunc(piece[:m], func(c rune) bool { return c != 0 })), good, good)
		}
		at += int64(m)
		r.zeros += int64(m)
		if errors.Is(err, io.EOF) {
			r.full = true
		} else if err != nil {
			return err
		}
	}
	return nil
}

// ErrSegmentTooLarge is the error of a segment file past the size a scan
// reads into memory whose end is not zeros (segmentReader.rest).
var ErrSegmentTooLarge = errors.New("journal: segment file too large")

func (r *segmentReader) close() error { return r.f.Close() }

// skip moves f's offset n bytes on from the start: by a seek where f can
// (the OS's files and faultfs's), else by reading n bytes.
func skip(f File, n int64) error {
	if s, ok := f.(io.Seeker); ok {
		_, err := s.Seek(n, io.SeekStart)
		if !errors.Is(err, errors.ErrUnsupported) {
			return err
		}
	}
	_, err := io.CopyN(io.Discard, f, n)
	return err
}
