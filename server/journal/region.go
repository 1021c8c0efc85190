package journal

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"os"
)

// region is a segment appended to by copying into space reserved ahead
// (DEVELOPERS.md, "Design: Journal format", appending by a copy): the
// writer reserves, then copies frames below the reserved size, and gives
// the space it did not use back when the segment is closed.
type region interface {
	reserve(size int64) error
	// copyFrames copies b, whole frames, to the file at off in the order
	// of copyOrdered, and returns how many leading bytes of b are whole
	// frames in the file (all of b unless err).
	copyFrames(b []byte, off int64) (int, error)
	// prefault readies the pages of [off, end) for copies (see
	// Writer.Prefault); a region without pages of its own does nothing.
	prefault(off, end int64) error
	release() error
}

// copyOrdered copies the frames of b with put (dst a file offset relative
// to b's start): every frame's payload first, then their headers in
// order. A copy cut short, the daemon killed part way, then leaves whole
// frames followed by frames without headers, which a scan cannot take for
// records (resync needs a length and a CRC-32C that match): what a write(2)
// cut short leaves, a prefix. One memmove is not ordered so: Go's copies
// the first 32 bytes of a long copy last, and a SIGKILL between left the
// batch's later records behind a hole, read back as records never
// acknowledged after a gap (found by TestSIGKILLSoak). It returns how many
// leading bytes of b are whole frames in the file.
func copyOrdered(b []byte, put func(dst int, src []byte) error) (int, error) {
	for off := 0; off < len(b); {
		end := off + frameSize + int(binary.LittleEndian.Uint32(b[off:]))
		if err := put(off+frameSize, b[off+frameSize:end]); err != nil {
			return 0, err
		}
		off = end
	}
	for off := 0; off < len(b); {
		if err := put(off, b[off:off+frameSize]); err != nil {
			return off, err
		}
		off += frameSize + int(binary.LittleEndian.Uint32(b[off:]))
	}
	return len(b), nil
}

// reserveChunk is how far past the last entry the writer reserves at a
// time: one fallocate(2) a mebibyte, a few thousand samples.
const reserveChunk = 1 << 20

// regionOf returns the region of an open segment, or nil when it is
// appended to by write(2): a file of a test's file system that can
// reserve (ReserveFile), or an operating-system file (a memory map where
// mapRegionOf has one).
func regionOf(f File) region {
	switch f := f.(type) {
	case ReserveFile:
		return fileRegion{f}
	case *os.File:
		return mapRegionOf(f)
	}
	return nil
}

// fileRegion is a ReserveFile as a region: a CopyAt a piece.
type fileRegion struct{ f ReserveFile }

func (r fileRegion) reserve(size int64) error    { return r.f.Reserve(size) }
func (r fileRegion) release() error              { return nil }
func (r fileRegion) prefault(int64, int64) error { return nil }

func (r fileRegion) copyFrames(b []byte, off int64) (int, error) {
	return copyOrdered(b, func(dst int, src []byte) error {
		n, err := r.f.CopyAt(src, off+int64(dst))
		if err == nil && n < len(src) {
			err = io.ErrShortWrite
		}
		return err
	})
}

// appendEntries puts b at the end of the segment, by a copy into reserved
// space or by write(2), and returns how many of its bytes are in.
func (w *Writer) appendEntries(b []byte) (int, error) {
	if w.reg == nil {
		return w.f.Write(b)
	}
	if need := w.size + int64(len(b)); need > w.reserved {
		size := max(need, min(w.size+reserveChunk, w.limit()))
		err := w.reg.reserve(size)
		if size > need && isNoSpace(err) {
			// Less than a chunk left on the disk: this write's own bytes
			// may still fit, and the robot keeps journaling until the
			// disk is full, a fallocate(2) a write.
			size = need
			err = w.reg.reserve(size)
		}
		if errors.Is(err, errors.ErrUnsupported) {
			if err := w.plain(); err != nil {
				return 0, err
			}
			return w.f.Write(b)
		}
		if err != nil {
			return 0, err
		}
		w.reserved = size
	}
	n, err := w.reg.copyFrames(b, w.size)
	if err != nil {
		// The reserve past the whole frames goes, so that nothing
		// half-copied is left there.
		w.truncate(w.size + int64(n))
	}
	return n, err
}

// plain turns the writer to write(2), for a file system that cannot
// reserve: the file must end at the last entry, where write(2) appends.
func (w *Writer) plain() error {
	if w.reserved > w.size {
		if err := w.f.Truncate(w.size); err != nil {
			return err
		}
	}
	w.release()
	return nil
}

// truncate sets the segment's size; in copy mode nothing is reserved past
// it then.
func (w *Writer) truncate(size int64) error {
	if err := w.f.Truncate(size); err != nil {
		return err
	}
	w.reserved = size
	return nil
}

// trim gives back the space reserved past the last entry, so that a
// segment that is rotated or closed ends at its last entry; a segment
// left by a crash ends in the zeros of its reserve (Scan.Spare).
func (w *Writer) trim() error {
	if w.reg == nil || w.reserved <= w.size {
		return nil
	}
	if err := w.truncate(w.size); err != nil {
		return fmt.Errorf("journal %s: giving back the reserved space: %w", w.segPath(), classify(err))
	}
	w.dirty = true // the size is to be synced
	return nil
}

// release ends the segment's region (unmaps it).
func (w *Writer) release() {
	if w.reg != nil {
		w.reg.release()
		w.reg = nil
	}
}
