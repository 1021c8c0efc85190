package journal

import (
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// Options configure a journal writer.
type Options struct {
	// SyncEach fsyncs after every Flush; otherwise the owner calls Sync.
	SyncEach bool
	// SegmentBytes starts a new segment file past this size (0: 64 MiB).
	SegmentBytes int64
	// FS is the file system (nil: OS).
	FS FS
}

// Writer appends records to a robot's journal segments
// dir/{robot}.{n}.rjl. It is not safe for concurrent use.
type Writer struct {
	fs         FS
	dir, robot string
	opt        Options
	f          File
	reg        region // nil: the segment is appended to by write(2)
	reserved   int64  // with reg, the segment file's size (>= size)
	seg        int
	size       int64 // bytes in the segment, all complete entries
	buf        []byte
	ends       []int // where each entry in buf ends
	dirty      bool  // written since the last fsync
	broken     error // wraps ErrBroken
	writes     uint64
	// prefaulted is the segment's size at the last Prefault.
	prefaulted int64
	// man is the manifest as last written (or to be written again, after
	// a failed write), and cur what it will record of the segment being
	// written when it is sealed: its last input and last snapshot so far
	// (marks, one per entry in buf, say what each entry adds).
	man   manifest
	cur   sealedSegment
	marks []entryMark
	// hinted is what the snapshot hint last written says (hintSnapshot),
	// hintErr why the last write of one failed.
	hinted  snapshotHint
	hintErr error
}

// entryMark is what an entry adds to what the manifest records of its
// segment: the sequence number of its last input with its output (0:
// none), and the offset in the buffer of its last snapshot record (-1:
// none) with its sequence number.
type entryMark struct {
	last    uint64
	snapAt  int
	snapSeq uint64
}

// SegmentPath returns the path of segment n of a robot's journal.
func SegmentPath(dir, robot string, n int) string {
	return filepath.Join(dir, fmt.Sprintf("%s.%06d%s", robot, n, Ext))
}

// segFile is a segment file and its number.
type segFile struct {
	n    int
	path string
}

// segmentNumber returns n when name is "{robot}.{n}.rjl" with six digits.
func segmentNumber(name, robot string) (int, bool) {
	s, ok := strings.CutPrefix(name, robot+".")
	if !ok {
		return 0, false
	}
	if s, ok = strings.CutSuffix(s, Ext); !ok || len(s) != 6 {
		return 0, false
	}
	n, err := strconv.Atoi(s)
	return n, err == nil && s[0] != '+' && s[0] != '-'
}

// listSegments lists a robot's segments in order of their numbers.
func listSegments(fsys FS, dir, robot string) ([]segFile, error) {
	names, err := fsys.List(dir)
	if err != nil {
		return nil, err
	}
	var out []segFile
	for _, name := range names { // sorted, and the numbers have six digits
		if n, ok := segmentNumber(name, robot); ok {
			out = append(out, segFile{n, filepath.Join(dir, name)})
		}
	}
	return out, nil
}

// Segments lists a robot's journal segments in order.
func Segments(dir, robot string) ([]string, error) { return SegmentsFS(nil, dir, robot) }

// SegmentsFS lists a robot's journal segments on fsys (nil: OS) in order.
func SegmentsFS(fsys FS, dir, robot string) ([]string, error) {
	segs, err := listSegments(orOS(fsys), dir, robot)
	out := make([]string, len(segs))
	for i, s := range segs {
		out[i] = s.path
	}
	return out, err
}

// Robots lists the robot ids that have journals in dir.
func Robots(dir string) ([]string, error) { return RobotsFS(nil, dir) }

// RobotsFS lists the robot ids that have journals in dir on fsys (nil:
// OS): segments, or a manifest whose segments are all missing (which Read
// reports as a gap).
func RobotsFS(fsys FS, dir string) ([]string, error) {
	names, err := orOS(fsys).List(dir)
	if err != nil {
		return nil, err
	}
	seen := map[string]bool{}
	var out []string
	for _, name := range names {
		id, ok := strings.CutSuffix(name, manifestExt)
		if !ok {
			i := strings.IndexByte(name, '.')
			if i < 0 {
				continue
			}
			id = name[:i]
			if _, ok = segmentNumber(name, id); !ok {
				continue
			}
		}
		if ValidID(id) && !seen[id] {
			seen[id] = true
			out = append(out, id)
		}
	}
	return out, nil // sorted: '.' sorts before every letter, digit and '-'
}

// Create starts a new journal for robot with its opening record. It fails
// if the robot already has one, or if robot is not a valid id. The first
// segment is made whole or not at all: header and opening are written to a
// temporary file and fsynced, which is then renamed and the directory
// fsynced; a failure (a full disk: ErrNoSpace) leaves nothing behind.
func Create(dir, robot string, opening *pb.JournalOpening, opt Options) (*Writer, error) {
	if !ValidID(robot) {
		return nil, fmt.Errorf("journal: robot id %q is not 1 to 63 lower-case letters, digits and hyphens, starting with a letter", robot)
	}
	w := &Writer{fs: orOS(opt.FS), dir: dir, robot: robot, opt: opt}
	segs, err := listSegments(w.fs, dir, robot)
	if err != nil {
		return nil, err
	}
	_, merr := w.fs.Stat(ManifestPath(dir, robot))
	if len(segs) > 0 || merr == nil {
		return nil, fmt.Errorf("journal for %s already exists in %s", robot, dir)
	}
	data, err := AppendFrame(header(), &pb.JournalRecord{Entry: &pb.JournalRecord_Opening{Opening: opening}})
	if err != nil {
		return nil, err
	}
	path, err := w.makeSegment(0, data)
	if err != nil {
		return nil, err
	}
	w.cur = sealedSegment{snapAt: -1}
	if err := writeManifest(w.fs, dir, robot, w.man); err != nil {
		w.fs.Remove(ManifestPath(dir, robot))
		return nil, w.unmake(path, err)
	}
	if err := w.open(0, path, int64(len(data))); err != nil {
		w.fs.Remove(ManifestPath(dir, robot))
		return nil, w.unmake(path, err)
	}
	return w, nil
}

// makeSegment makes segment n with data durably (temporary file, fsync,
// rename, directory fsync) and returns its path. A failure removes what it
// made.
func (w *Writer) makeSegment(n int, data []byte) (string, error) {
	path := SegmentPath(w.dir, w.robot, n)
	tmp := path + tmpExt
	if err := writeSynced(w.fs, tmp, data, os.O_WRONLY|os.O_CREATE|os.O_TRUNC); err != nil {
		w.fs.Remove(tmp)
		return "", fmt.Errorf("journal %s: %w", tmp, classify(err))
	}
	if err := w.fs.Rename(tmp, path); err != nil {
		w.fs.Remove(tmp)
		return "", fmt.Errorf("journal %s: %w", path, classify(err))
	}
	if err := w.fs.SyncDir(w.dir); err != nil {
		return "", w.unmake(path, err)
	}
	return path, nil
}

// unmake removes a segment that could not be completed and returns err.
func (w *Writer) unmake(path string, err error) error {
	w.fs.Remove(path)
	w.fs.SyncDir(w.dir)
	return fmt.Errorf("journal %s: %w", path, classify(err))
}

// open makes segment n, of size bytes, the one appended to.
func (w *Writer) open(n int, path string, size int64) error {
	f, err := w.fs.OpenFile(path, os.O_RDWR|os.O_APPEND, 0)
	if err != nil {
		return err
	}
	if w.f != nil {
		w.release()
		w.f.Close() // trimmed and fsynced before the rotation
	}
	w.f, w.seg, w.size, w.dirty = f, n, size, false
	w.reg, w.reserved, w.prefaulted = regionOf(f), size, size
	return nil
}

// Resume reopens segment seg, the last, for appending at offset good (the
// end of its last complete entry, Scan.Good), truncating the torn tail or
// the unused reserve (Scan.Spare) after it; Read has copied aside any damaged bytes there. It removes
// temporary files left by an interrupted creation, completes a segment
// whose header is short or invalid (the original is kept as
// {segment}.damaged, the records Read recovered from it are kept), and
// writes the manifest if it is missing or behind.
//
// The manifest also gets the records of the sealed segments (all but the
// last) that it lacks, from what the scan read of them whole: an older
// journal's manifest has none, and the first restart by this build reads
// the whole journal and records them, so that the next one reads only
// from the last snapshot on. No segment is rewritten for it.
func Resume(dir, robot string, sc *Scan, opt Options) (*Writer, error) {
	seg, good := sc.Segment, sc.Good
	w := &Writer{fs: orOS(opt.FS), dir: dir, robot: robot, opt: opt}
	if err := removeLeftovers(w.fs, dir, robot); err != nil {
		return nil, err
	}
	man, ok, err := readManifest(w.fs, dir, robot)
	if err != nil {
		return nil, err
	}
	if ok && man.newest > seg {
		return nil, fmt.Errorf("%w: resuming %s at segment %06d, but the manifest names segment %06d", ErrGap, robot, seg, man.newest)
	}
	path := SegmentPath(dir, robot, seg)
	before := good
	if good, err = w.completeHeader(path, good); err != nil {
		return nil, err
	}
	w.cur = sealedSegment{n: seg, last: sc.LastSequence, snapAt: -1}
	if s := sc.lastSeg; s.n == seg && s.snapAt >= 0 && good == before {
		w.cur.snapAt, w.cur.snapSeq = s.snapAt, s.snapSeq
	}
	f, err := w.fs.OpenFile(path, os.O_RDWR|os.O_APPEND, 0)
	if err != nil {
		return nil, err
	}
	w.f, w.seg, w.size = f, seg, good
	w.reg, w.reserved, w.prefaulted = regionOf(f), good, good
	if err := f.Truncate(good); err != nil {
		f.Close()
		return nil, fmt.Errorf("journal %s: %w", path, err)
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return nil, fmt.Errorf("journal %s: %w", path, err)
	}
	had := len(man.sealed)
	man.complete(sc.sealed, seg)
	w.man = man
	if !ok || man.newest < seg || len(man.sealed) > had {
		w.man.newest = seg
		if err := writeManifest(w.fs, dir, robot, w.man); err != nil {
			f.Close()
			return nil, classify(err)
		}
	}
	return w, nil
}

// removeLeftovers removes a robot's temporary files: segments, manifests
// and snapshot hints whose creation was interrupted, never acknowledged.
func removeLeftovers(fsys FS, dir, robot string) error {
	names, err := fsys.List(dir)
	if err != nil {
		return err
	}
	removed := false
	for _, name := range names {
		base, ok := strings.CutSuffix(name, tmpExt)
		if !ok {
			continue
		}
		if _, seg := segmentNumber(base, robot); seg || base == robot+manifestExt || base == robot+hintExt {
			if err := fsys.Remove(filepath.Join(dir, name)); err != nil {
				return err
			}
			removed = true
		}
	}
	if removed {
		return fsys.SyncDir(dir)
	}
	return nil
}

// completeHeader checks the header of the segment at path; when it is
// short or invalid (a creation by an older build cut by a crash, a stray
// file) it keeps the file as {path}.damaged and replaces it, atomically, by
// a header followed by the frames Read recovered from it (from the first
// valid frame to good). It returns the resume offset in the segment.
func (w *Writer) completeHeader(path string, good int64) (int64, error) {
	f, err := w.fs.OpenFile(path, os.O_RDONLY, 0)
	if err != nil {
		return 0, err
	}
	h := make([]byte, headerSize)
	n, _ := io.ReadFull(f, h)
	f.Close()
	if n == headerSize && checkHeader(h) == nil {
		return good, nil
	}
	b, err := readFile(w.fs, path)
	if err != nil {
		return 0, err
	}
	data := header()
	if first := resync(b, 0); first >= 0 && int64(first) < good {
		data = append(data, b[first:good]...)
	}
	if len(b) > 0 {
		kept, err := asideName(w.fs, path+".damaged")
		if err != nil {
			return 0, err
		}
		if err := writeSynced(w.fs, kept, b, os.O_WRONLY|os.O_CREATE|os.O_EXCL); err != nil {
			return 0, fmt.Errorf("journal %s: %w", kept, classify(err))
		}
	}
	if err := writeFileAtomic(w.fs, path, data); err != nil {
		return 0, fmt.Errorf("journal %s: %w", path, classify(err))
	}
	return int64(len(data)), nil
}

// Append adds the records as one entry and flushes: when it returns nil
// the records are in the operating system's hands (and on disk with
// SyncEach): a crash of the process loses none of them.
func (w *Writer) Append(recs ...*pb.JournalRecord) error {
	if err := w.Add(recs...); err != nil {
		return err
	}
	_, err := w.Flush()
	return err
}

// Add frames records into the writer's buffer as one entry, without
// writing them; Flush writes what was added (group commit).
func (w *Writer) Add(recs ...*pb.JournalRecord) error {
	n := len(w.buf)
	mark := entryMark{snapAt: -1}
	var err error
	for i, r := range recs {
		at := len(w.buf)
		if w.buf, err = AppendFrame(w.buf, r); err != nil {
			w.buf = w.buf[:n]
			return err
		}
		switch {
		case r.GetOutput() != nil && i > 0 && recs[i-1].GetInput() != nil:
			mark.last = recs[i-1].GetInput().GetSequence()
		case r.GetSnapshot() != nil:
			mark.snapAt, mark.snapSeq = at, r.GetSnapshot().GetSequence()
		}
	}
	w.ends = append(w.ends, len(w.buf))
	w.marks = append(w.marks, mark)
	return nil
}

// AddPair frames an input and its output as two records, with the same
// bytes as JournalRecord messages holding them (AddEncodedPair with their
// deterministic encodings).
func (w *Writer) AddPair(in *pb.JournalInput, out *pb.JournalOutput) error {
	opts := proto.MarshalOptions{Deterministic: true}
	sample, err := opts.Marshal(in.GetSample())
	if err != nil {
		return err
	}
	resp, err := opts.Marshal(out.GetResponse())
	if err != nil {
		return err
	}
	return w.AddSessionPair(EncodedInput{Sequence: in.GetSequence(), Sample: sample, ArrivalUnixNs: in.GetArrivalUnixNs(),
		SessionID: in.GetSessionId(), ClientSequence: in.GetClientSequence()}, resp, out.GetPose())
}

// EncodedInput is a JournalInput whose sample is already in wire form.
type EncodedInput struct {
	Sequence       uint64
	Sample         []byte
	ArrivalUnixNs  int64
	SessionID      string
	ClientSequence uint64
}

// AddEncodedPair frames an input and its output from parts already in wire
// form: the sample as it arrived and the response as it will be sent, so
// that neither is encoded again. It writes the same bytes as framing the
// JournalRecord messages, provided sample and response are the
// deterministic encodings; other encodings of the same messages decode to
// the same records. pose may be nil. On error the buffer keeps what it
// held.
func (w *Writer) AddEncodedPair(seq uint64, sample []byte, arrivalUnixNs int64, response []byte, pose *pb.FusedPose) error {
	return w.AddSessionPair(EncodedInput{Sequence: seq, Sample: sample, ArrivalUnixNs: arrivalUnixNs}, response, pose)
}

// AddSessionPair is AddEncodedPair with the input's ingest session and
// client sequence.
func (w *Writer) AddSessionPair(in EncodedInput, response []byte, pose *pb.FusedPose) error {
	b, err := appendInput(w.buf, in)
	if err == nil {
		b, err = appendOutput(b, response, pose)
	}
	if err != nil {
		return err // w.buf is untouched: b only appended past its length
	}
	w.buf = b
	w.ends = append(w.ends, len(b))
	w.marks = append(w.marks, entryMark{last: in.Sequence, snapAt: -1})
	return nil
}

// Flush writes the entries added since the last Flush with one write (a
// copy into space reserved ahead, where the file system can reserve; see
// ReserveFile), fsyncs with SyncEach, and starts the next segment when this one is full.
// complete is how many of those entries, in order, are whole in the
// journal. On an error the segment is taken back to the end of the last
// complete entry and the other entries are dropped from the buffer; the
// writer stays usable (a full disk, ErrNoSpace, may have room later),
// unless the error wraps ErrBroken. A failed rotation after a good write
// returns complete = all with a *RotateError and is tried again at the
// next Flush.
func (w *Writer) Flush() (complete int, err error) {
	if w.broken != nil {
		w.drop()
		return 0, w.broken
	}
	if len(w.buf) == 0 {
		return 0, nil
	}
	entries := len(w.ends)
	n, err := w.appendEntries(w.buf)
	if err != nil {
		return w.takeBack(n, err)
	}
	before := w.size
	w.size += int64(len(w.buf))
	marks := w.marks
	w.drop()
	w.dirty = true
	w.writes++
	if w.opt.SyncEach {
		if err := w.f.Sync(); err != nil {
			return 0, w.unsync(before, err)
		}
		w.dirty = false
	}
	w.mark(marks, before)
	w.hintSnapshot()
	if w.size >= w.limit() {
		if err := w.rotate(); err != nil {
			return entries, err
		}
	}
	return entries, nil
}

// takeBack handles a write that failed after n bytes: it counts the
// entries written whole and truncates the rest away. With SyncEach the
// entries written whole are fsynced before they count as complete (the
// owner acknowledges them); a failed fsync takes them back too.
func (w *Writer) takeBack(n int, err error) (int, error) {
	complete, keep := 0, 0
	for complete < len(w.ends) && w.ends[complete] <= n {
		keep = w.ends[complete]
		complete++
	}
	marks := w.marks[:complete]
	w.drop()
	err = fmt.Errorf("journal %s: %w", w.segPath(), classify(err))
	if n > keep {
		if terr := w.truncate(w.size + int64(keep)); terr != nil {
			w.broken = fmt.Errorf("%w: %v; truncating the incomplete entry: %v", ErrBroken, err, terr)
			return complete, w.broken
		}
	}
	before := w.size
	w.size += int64(keep)
	if keep > 0 {
		w.dirty = true
		w.writes++
		if w.opt.SyncEach {
			if serr := w.f.Sync(); serr != nil {
				uerr := w.unsync(before, serr)
				if w.broken != nil {
					return 0, uerr
				}
				return 0, fmt.Errorf("%w; %v", err, uerr)
			}
			w.dirty = false
		}
	}
	w.mark(marks, before)
	w.hintSnapshot()
	return complete, err
}

// unsync handles a failed fsync of SyncEach: the entries of the Flush are
// not durable, so none is complete; they are truncated away (the size as
// before) and the truncation fsynced, or the writer is broken.
func (w *Writer) unsync(before int64, err error) error {
	err = fmt.Errorf("journal %s: fsync: %w", w.segPath(), classify(err))
	if terr := w.truncate(before); terr != nil {
		w.broken = fmt.Errorf("%w: %v; truncating: %v", ErrBroken, err, terr)
		return w.broken
	}
	if serr := w.f.Sync(); serr != nil {
		w.broken = fmt.Errorf("%w: %v; fsync after truncating: %v", ErrBroken, err, serr)
		return w.broken
	}
	w.size, w.dirty = before, false
	return err
}

// drop empties the buffer.
func (w *Writer) drop() {
	w.buf, w.ends, w.marks = w.buf[:0], w.ends[:0], w.marks[:0]
}

// mark notes what the complete entries whose marks these are add to the
// segment's record; base is the segment's size before them.
func (w *Writer) mark(marks []entryMark, base int64) {
	for _, m := range marks {
		if m.last != 0 {
			w.cur.last = m.last
		}
		if m.snapAt >= 0 {
			w.cur.snapAt, w.cur.snapSeq = base+int64(m.snapAt), m.snapSeq
		}
	}
}

func (w *Writer) limit() int64 {
	if w.opt.SegmentBytes > 0 {
		return w.opt.SegmentBytes
	}
	return 64 << 20
}

func (w *Writer) segPath() string { return SegmentPath(w.dir, w.robot, w.seg) }

// rotate gives back the full segment's unused reserve and fsyncs it, so
// that no later segment exists while it could still lose its tail or end
// in zeros, and starts the next one with its header; then the manifest
// names it. A failure is a *RotateError.
func (w *Writer) rotate() error {
	if err := w.trim(); err != nil {
		return &RotateError{Segment: SegmentPath(w.dir, w.robot, w.seg+1), Err: err}
	}
	if err := w.Sync(); err != nil {
		return &RotateError{Segment: SegmentPath(w.dir, w.robot, w.seg+1), Err: err}
	}
	n := w.seg + 1
	sealed := w.cur
	sealed.n, sealed.size = w.seg, w.size
	path, err := w.makeSegment(n, header())
	if err == nil {
		if err = w.open(n, path, headerSize); err != nil {
			err = w.unmake(path, err)
		}
	}
	if err == nil {
		// The segment sealed is recorded even if this write fails: the
		// next rotation's write records it (a lagging manifest is safe).
		w.cur = sealedSegment{n: n, last: sealed.last, snapAt: -1}
		w.man.newest, w.man.sealed = n, append(w.man.sealed, sealed)
		err = writeManifest(w.fs, w.dir, w.robot, w.man)
	}
	if err != nil {
		return &RotateError{Segment: SegmentPath(w.dir, w.robot, n), Err: classify(err)}
	}
	return nil
}

// SyncPoint returns the path of the segment being written and how many
// writes went into the journal so far: a periodic fsync that runs without
// the owner's lock (through a descriptor of its own) syncs path, and
// need not sync again while writes stays the same. Earlier segments were
// fsynced before the next one started.
func (w *Writer) SyncPoint() (path string, writes uint64) {
	return w.segPath(), w.writes
}

// Prefault readies the pages that the next appends are likely to copy
// into, where the writer appends by a copy into a memory map: it makes
// them present and writable with one system call (region.prefault), so
// that the copies, made while an owner waits for its verdict, take no
// page fault. A writeback (the periodic fsync) makes the page being
// filled read-only again, and each new page costs a fault on its first
// copy: about 1 in 15 of RobotRates' samples took one, at about 25 us each
// on the development machine (DEVELOPERS.md, "Readying the pages ahead").
// It readies from the page holding the end of the segment up to twice
// what was appended since the last call (at least a page, at most
// prefaultMax), within the reserve. Call it after a periodic sync. It
// changes nothing a reader or a crash can see: the pages hold what the
// file holds (the reserve reads as zeros). An error (a kernel without
// MADV_POPULATE_WRITE, Linux before 5.14) leaves the writer as it was;
// the copies then take their faults as before. Such a kernel is reported
// by the first call only; later calls do nothing.
func (w *Writer) Prefault() error {
	if w.reg == nil || w.broken != nil {
		return nil
	}
	ahead := min(max(2*(w.size-w.prefaulted), int64(os.Getpagesize())), prefaultMax)
	w.prefaulted = w.size
	return w.reg.prefault(w.size, min(w.size+ahead, w.reserved))
}

// prefaultMax bounds what Prefault readies: 256 KiB, over 2 s of a robot
// at 200 Hz odometry, 100 Hz IMU and 10 Hz fixes.
const prefaultMax = 256 << 10

// Sync fsyncs the current segment if anything was written since the last
// fsync. A failed fsync breaks the writer (see ErrBroken).
func (w *Writer) Sync() error {
	if w.broken != nil {
		return w.broken
	}
	if !w.dirty {
		return nil
	}
	if err := w.f.Sync(); err != nil {
		w.broken = fmt.Errorf("%w: fsync %s: %w", ErrBroken, w.segPath(), classify(err))
		return w.broken
	}
	w.dirty = false
	return nil
}

// Close gives back the unused reserve, syncs and closes the journal. It does not flush: entries added
// since the last Flush are dropped, not written. An owner acknowledges an
// entry only after Flush counts it complete, so the dropped entries were
// never acknowledged, and the journal keeps exactly what was (the server
// adds and flushes under the robot's lock, which Close waits for).
func (w *Writer) Close() error {
	if w.f == nil {
		return nil
	}
	var err error
	if w.broken == nil {
		err = w.trim()
	}
	if serr := w.Sync(); err == nil {
		err = serr
	}
	w.release()
	if cerr := w.f.Close(); err == nil {
		err = cerr
	}
	w.f = nil
	return err
}

// Remove closes the journal and sets it aside (SetAside), so that a
// deleted robot's record stays for review, is not restored, and is never
// overwritten by the record of a later robot of the same name. A journal
// that broke (ErrBroken) is set aside as it is.
func (w *Writer) Remove() error {
	if err := w.Close(); err != nil && !errors.Is(err, ErrBroken) {
		return err
	}
	return SetAside(w.fs, w.dir, w.robot)
}

// SetAside renames a robot's journal files in dir on fsys (nil: the OS) to
// {name}.deleted-{unix nanoseconds}, a name that no other file has (a
// suffix .1, .2 ... is added if one does): its manifest, its segments, its
// snapshot hint and the copies of damaged bytes kept beside them
// ({segment}.damaged-{offset}, {segment}.damaged), so that a later robot of the same name starts with
// none of them. Nothing is rewritten or removed. The journal must not be
// open for writing; a journal that cannot be restored is set aside as it
// is, so that the robot's name can be used again.
func SetAside(fsys FS, dir, robot string) error {
	fsys = orOS(fsys)
	names, err := fsys.List(dir)
	if err != nil {
		return err
	}
	// The manifest first: a crash part way leaves segments without their
	// first ones, which Read reports, rather than fewer segments that it
	// could not tell from a whole journal. The damaged copies last: they
	// are not read.
	var segs, kept []string
	if _, err := fsys.Stat(ManifestPath(dir, robot)); err == nil {
		segs = append(segs, ManifestPath(dir, robot))
	}
	if _, err := fsys.Stat(HintPath(dir, robot)); err == nil {
		kept = append(kept, HintPath(dir, robot))
	}
	for _, name := range names { // sorted, and the numbers have six digits
		if _, ok := segmentNumber(name, robot); ok {
			segs = append(segs, filepath.Join(dir, name))
		} else if i := strings.Index(name, Ext+".damaged"); i > 0 && !strings.Contains(name, DeletedMark) {
			if _, ok := segmentNumber(name[:i+len(Ext)], robot); ok {
				kept = append(kept, filepath.Join(dir, name))
			}
		}
	}
	suffix := DeletedMark + strconv.FormatInt(time.Now().UnixNano(), 10)
	for _, p := range append(segs, kept...) {
		to, err := asideName(fsys, p+suffix)
		if err != nil {
			return err
		}
		if err := fsys.Rename(p, to); err != nil {
			return err
		}
	}
	return fsys.SyncDir(dir)
}

// DeletedMark starts the suffix SetAside appends to the names of a journal's
// files: ".deleted-{unix nanoseconds}".
const DeletedMark = ".deleted-"
