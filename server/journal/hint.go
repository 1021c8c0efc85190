package journal

import (
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
)

// The snapshot hint, {dir}/{robot}.lastsnap, says where the newest
// snapshot the writer wrote starts: its segment, its offset and its
// sequence number. The manifest records snapshots only when their segment
// is sealed, and a segment holds up to 64 MiB (about 35 minutes of a robot at
// robot rates, hours of a quieter one),
// so without the hint a restart reads the segment being written from its
// start; with it, a restart reads from the newest snapshot on, what the
// snapshot interval bounds (ReadFS).
//
// The hint is advice, never a record: the writer replaces it after each
// Flush that wrote a snapshot (atomically, by a rename, but without an
// fsync of its own: it costs no sync, and a crash may leave an older hint
// or none), and a scan uses it only when the frame at its offset is whole,
// its CRC-32C matches, and it is a snapshot of the sequence number the
// hint gives. Any other hint (missing, stale, pointing past a torn tail,
// not parsable) sends the scan back to the manifest's record, then to the
// whole read, as before the hint existed; an older hint only means more to
// replay. Builds before it ignore the file.
const (
	hintExt  = ".lastsnap"
	hintHead = "reckon journal snapshot hint 1\n"
)

// HintPath returns the path of a robot's snapshot hint.
func HintPath(dir, robot string) string { return filepath.Join(dir, robot+hintExt) }

// snapshotHint is what a hint says: segment n holds a snapshot of input
// seq at byte at.
type snapshotHint struct {
	n   int
	at  int64
	seq uint64
}

func (h snapshotHint) text() string {
	return fmt.Sprintf("%ssegment %06d at %d input %d\n", hintHead, h.n, h.at, h.seq)
}

// readHint reads a robot's hint; ok is false when there is none or it
// cannot be parsed.
func readHint(fsys FS, dir, robot string) (h snapshotHint, ok bool) {
	f, err := fsys.OpenFile(HintPath(dir, robot), os.O_RDONLY, 0)
	if err != nil {
		return h, false
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, 256))
	if err != nil {
		return h, false
	}
	body, found := strings.CutPrefix(string(b), hintHead)
	if !found {
		return h, false
	}
	if n, err := fmt.Sscanf(body, "segment %d at %d input %d\n", &h.n, &h.at, &h.seq); err != nil || n != 3 || h.n < 0 || h.at < headerSize || h.seq == 0 || body != h.text()[len(hintHead):] {
		return snapshotHint{}, false
	}
	return h, true
}

// writeHint replaces a robot's hint with h: written to a temporary file,
// which is renamed over it, neither fsynced (see the hint's comment).
func writeHint(fsys FS, dir, robot string, h snapshotHint) error {
	name := HintPath(dir, robot)
	tmp := name + tmpExt
	f, err := fsys.OpenFile(tmp, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o644)
	if err == nil {
		_, err = io.WriteString(f, h.text())
		if cerr := f.Close(); err == nil {
			err = cerr
		}
	}
	if err == nil {
		err = fsys.Rename(tmp, name)
	}
	if err != nil {
		fsys.Remove(tmp)
	}
	return err
}

// hintSnapshot writes the hint when the segment being written holds a
// snapshot newer than the one the last hint named. A failure (a full
// disk) costs nothing but a longer restart; it is kept in hintErr and the
// next snapshot tries again.
func (w *Writer) hintSnapshot() {
	h := snapshotHint{n: w.seg, at: w.cur.snapAt, seq: w.cur.snapSeq}
	if h.at < 0 || h == w.hinted {
		return
	}
	w.hintErr = writeHint(w.fs, w.dir, w.robot, h)
	if w.hintErr == nil {
		w.hinted = h
	}
}

// prefixFS reads the file at path as if it ended at byte n: Verify reads
// the part of the segment being written before the snapshot a restore
// started from, while the writer appends after it.
type prefixFS struct {
	FS
	path string
	n    int64
}

func (p prefixFS) OpenFile(name string, flag int, perm os.FileMode) (File, error) {
	f, err := p.FS.OpenFile(name, flag, perm)
	if err != nil || name != p.path {
		return f, err
	}
	return &prefixFile{File: f, left: p.n, n: p.n}, nil
}

func (p prefixFS) Stat(name string) (os.FileInfo, error) {
	fi, err := p.FS.Stat(name)
	if err != nil || name != p.path {
		return fi, err
	}
	return sizedInfo{fi, min(fi.Size(), p.n)}, nil
}

type prefixFile struct {
	File
	left, n int64
}

func (f *prefixFile) Read(b []byte) (int, error) {
	if f.left <= 0 {
		return 0, io.EOF
	}
	if int64(len(b)) > f.left {
		b = b[:f.left]
	}
	k, err := f.File.Read(b)
	f.left -= int64(k)
	return k, err
}

func (f *prefixFile) Stat() (os.FileInfo, error) {
	fi, err := f.File.Stat()
	if err != nil {
		return nil, err
	}
	return sizedInfo{fi, min(fi.Size(), f.n)}, nil
}

// sizedInfo is a FileInfo with another size.
type sizedInfo struct {
	os.FileInfo
	size int64
}

func (s sizedInfo) Size() int64 { return s.size }
