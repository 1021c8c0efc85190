package journal

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
	"path/filepath"
	"regexp"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// Scan describes what Read found.
type Scan struct {
	Opening *pb.JournalOpening
	// Segment and Good are the last segment read and the offset just past
	// its last complete input and output: where appending resumes.
	Segment int
	Good    int64
	// Torn, if not nil, says where and why the last segment's tail was cut
	// short (a crash while writing it): nothing after it is a valid frame.
	// TornKept names the copy of the torn bytes, unless they were only the
	// start of a frame that runs past the end, zeros, or the start of a
	// header.
	Torn        *TornError
	TornSegment string
	TornKept    string
	// Damage lists the damaged byte ranges found inside the journal, each
	// copied aside, after which the scan went on at the next valid frame.
	// Damage that cost inputs also makes Read return an ErrGap.
	Damage []*DamageError
	// Spare counts the zeros after the last complete entry of the last
	// segment: space the writer reserved and had not used when it stopped
	// without closing the journal (a crash; see journal.ReserveFile). It
	// is not a torn tail, and appending resumes at Good.
	Spare int64
	// Unanswered is true when the tail held an input without its output:
	// it was never acknowledged and is dropped with the tail.
	Unanswered bool
	Closed     bool
	// Pairs counts the inputs with their outputs in the journal; Replayed
	// those passed to the Visitor (fewer when a snapshot was used).
	Pairs, Replayed int
	// LastSequence is the sequence number of the last input with its
	// output (0: none).
	LastSequence uint64
	// SnapshotSequence is the sequence of the snapshot used (0: none).
	SnapshotSequence uint64
	// FromSegment and FromOffset are where the scan began to read records
	// (0, 0: at the start). A scan with a Snapshot visitor of a journal
	// whose manifest records its sealed segments starts at the last
	// snapshot the manifest records; of the journal before it, it reads
	// only the opening record, and checks each older segment's size
	// against the manifest. Pairs then counts the inputs before that
	// snapshot by its sequence number. Verify reads the rest.
	FromSegment int
	FromOffset  int64
	// sealed are the segments read whole before the last (what the
	// manifest records of them, as found), and lastSeg the last one as
	// far as it was read; Resume completes the manifest from them.
	sealed  []sealedSegment
	lastSeg sealedSegment
}

// DamageNote says what Damage holds in one line for a person: the first
// damaged range and how many more there are, or "" when there is none.
// The offline tools print it, since damage that cost no input ends no
// read and would otherwise go unsaid.
func (s *Scan) DamageNote() string {
	switch len(s.Damage) {
	case 0:
		return ""
	case 1:
		return s.Damage[0].Error()
	}
	return fmt.Sprintf("%v; and %d more damaged ranges", s.Damage[0], len(s.Damage)-1)
}

// Visitor receives what Read reads.
type Visitor struct {
	// Opening is called with the opening record before anything else.
	Opening func(*pb.JournalOpening) error
	// Snapshot, if set, makes the scan start from the journal's last
	// snapshot: it is called with that snapshot, and Pair only for the
	// inputs after it. Without it, Pair sees every input.
	Snapshot func(*pb.JournalSnapshot) error
	// Pair is called for every input with the output recorded after it.
	Pair func(in *pb.JournalInput, out *pb.JournalOutput) error
	// Input, if set instead of Pair, is called for every input that has
	// its output; the outputs are then not decoded.
	Input func(in *pb.JournalInput) error
	// Gap, if set, is called at each continuity break (an error wrapping
	// ErrGap) and the scan goes on handing records to the visitor if it
	// returns nil; without it the visitor gets nothing after the first
	// (what a replay needs: the inputs after a gap would give another
	// robot). Read returns the first break as its error either way.
	Gap func(err error) error
	// ReadOnly leaves the journal's directory as it is: damaged ranges are
	// reported (DamageError.Kept stays empty) but not copied aside. The
	// offline tools read so; restore keeps them.
	ReadOnly bool
}

// scanState carries a scan across segments. The payloads it keeps alias
// the segments' buffers, which are never reused.
type scanState struct {
	fs      FS
	dir     string
	robot   string // its files' names (not a set-aside journal's name)
	sc      *Scan
	v       Visitor
	pending []byte   // an input's payload waiting for its output
	kept    [][]byte // with a Snapshot visitor: payloads since the last snapshot
	snap    []byte   // the last snapshot record's payload
	damaged bool     // damage seen: an output without its input is skipped
	gap     error    // the first continuity break
	stopped bool     // the visitor gets nothing more: a gap without Visitor.Gap
	// buf is the last segment's buffer, which the next one reuses when
	// nothing refers to it: records are decoded into messages of their
	// own, and only a Snapshot visitor keeps payloads past their segment.
	buf []byte
	// inputs are the JournalInputs handed out next (st.input), and dec
	// decodes most of them.
	inputs []pb.JournalInput
	dec    inputDecoder
	// man is the manifest (the zero value when there is none), and seg
	// what was read of the segment being read (sealedSegment).
	man manifest
	seg sealedSegment
	// ctx, if set, stops the scan between segments (Verify).
	ctx context.Context
}

// Read reads a robot's journal in the OS file system (ReadFS).
func Read(dir, robot string, v Visitor) (Scan, error) { return ReadFS(nil, dir, robot, v) }

// ReadFS reads a robot's journal segments in order from fsys (nil: OS) and
// hands the records to v. Each segment is read into one buffer and its
// frames checked there.
//
// Damage never costs intact records: a frame whose length, CRC-32C or
// payload is wrong is copied aside ({segment}.damaged-{offset}, see
// DamageError and Scan.Damage) and the scan resynchronises at the next
// frame whose length is in bounds, whose CRC-32C matches and whose payload
// decodes as a record of a known kind. A segment with a short or invalid
// header is read the same way from byte 0. Continuity is checked: segment
// numbers from 0 without a hole, up to the newest the manifest names, and
// input sequence numbers (and snapshots') each one more than the last
// complete input's. A break is an error wrapping ErrGap (joined with the
// first *DamageError, if any), and the visitor gets nothing after it
// unless Visitor.Gap says to go on; the scan reads to the end either way,
// keeping aside every damaged range. The torn
// tail of the last segment (Scan.Torn) is not an error: it was never
// acknowledged. An error from v stops the scan and is returned.
//
// With a Snapshot visitor, when the manifest records the sealed segments
// (from segment 0 on), the scan starts at the last snapshot recorded: it
// checks that each recorded segment is there with the size recorded, reads
// segment 0's opening record and the snapshot's frame (both CRC-checked),
// and reads the rest of that segment and every later one as above
// (Scan.FromSegment, Scan.FromOffset). The part before is read by Verify.
// When any of that does not hold, it reads the whole journal, which reports
// what is wrong; a sealed segment that differs from its record without
// damage inside it (cut or grown at a frame's end) is then reported as a
// DamageError.
//
// A robot named as a set-aside journal, "{robot}.deleted-{unix ns}" (Aside),
// is read from the files SetAside renamed, read only.
func ReadFS(fsys FS, dir, robot string, v Visitor) (Scan, error) {
	var sc Scan
	name := robot
	if id, suffix, ok := Aside(robot); ok {
		fsys, robot = AsideFS(fsys, suffix), id
	}
	st := &scanState{fs: orOS(fsys), sc: &sc, v: v}
	segs, err := st.open(dir, robot, name)
	if err != nil {
		return sc, err
	}
	from := 0
	if v.Snapshot != nil {
		if from, err = st.fromManifest(segs); err != nil {
			return sc, err
		}
	}
	if err := st.segments(segs[from:], true); err != nil {
		return sc, err
	}
	if st.man.newest > sc.Segment {
		if err := st.noteGap(fmt.Errorf("%w: segment %06d missing: the manifest names it the newest, the last found is %s", ErrGap, st.man.newest, segs[len(segs)-1].path)); err != nil {
			return sc, err
		}
	}
	if sc.Opening == nil {
		return sc, errors.Join(fmt.Errorf("journal for %s has no opening record: its first segment %s holds none (empty, cut short or not a journal segment)", robot, segs[0].path), st.gap, st.firstDamage())
	}
	if err := st.fromSnapshot(); err != nil {
		return sc, err
	}
	if st.gap != nil {
		return sc, errors.Join(st.gap, st.firstDamage())
	}
	return sc, nil
}

// open lists a robot's segments and reads its manifest; name is the name
// the robot was asked for.
func (st *scanState) open(dir, robot, name string) ([]segFile, error) {
	st.dir, st.robot = dir, robot
	segs, err := listSegments(st.fs, dir, robot)
	if err != nil {
		return nil, err
	}
	man, ok, err := readManifest(st.fs, dir, robot)
	if err != nil {
		return nil, err
	}
	st.man = man
	if len(segs) == 0 {
		if ok {
			return nil, fmt.Errorf("%w: no segment of %s in %s, its manifest names segment %06d", ErrGap, robot, dir, man.newest)
		}
		return nil, fmt.Errorf("%w for %s in %s", ErrNoJournal, name, dir)
	}
	if segs[0].n != 0 {
		// Only the first holds the opening record: nothing after it can
		// be read as this robot's.
		return nil, fmt.Errorf("%w: segment 000000 missing: the first of %s in %s is %s, and only the first holds the opening record (the robot's configuration)", ErrGap, robot, dir, segs[0].path)
	}
	return segs, nil
}

// segments scans segs in order; the last of them is the journal's last
// when toEnd.
func (st *scanState) segments(segs []segFile, toEnd bool) error {
	for i, s := range segs {
		if want := segs[max(i-1, 0)].n + min(i, 1); s.n != want {
			if err := st.noteGap(fmt.Errorf("%w: %s: segment %06d missing before it", ErrGap, s.path, want)); err != nil {
				return err
			}
		}
		if st.ctx != nil && st.ctx.Err() != nil {
			return st.ctx.Err()
		}
		st.sc.Segment = s.n
		from := int64(0)
		if i == 0 {
			from = st.sc.FromOffset
		}
		if err := st.segment(s.path, s.n == 0, toEnd && i == len(segs)-1, from); err != nil {
			return err
		}
	}
	return nil
}

// fromManifest finds where a scan with a Snapshot visitor can start: at
// the newest snapshot known, the last one the manifest records or the one
// the snapshot hint names (hint.go), when the manifest records every
// segment before it from segment 0 on, each of them is there with the
// size recorded, segment 0 starts with a valid opening record, the
// snapshot's segment with a valid header, and the snapshot is there. It
// then hands the visitor the opening, readies the scan to go on from the
// snapshot and returns the index in segs of its segment; else it returns
// 0, and the scan reads the whole journal (which finds and reports what is
// wrong, if anything is).
func (st *scanState) fromManifest(segs []segFile) (int, error) {
	rec := st.man.sealed
	k := 0
	for k < len(rec) && k < len(segs)-1 && rec[k].n == k && segs[k].n == k {
		k++
	}
	start := snapshotHint{n: -1}
	for i := range k {
		fi, err := st.fs.Stat(segs[i].path)
		if err != nil || fi.Size() != rec[i].size {
			return 0, nil
		}
		if rec[i].snapAt >= 0 {
			start = snapshotHint{n: i, at: rec[i].snapAt, seq: rec[i].snapSeq}
		}
	}
	if h, ok := readHint(st.fs, st.dir, st.robot); ok && h.n <= k && h.n < len(segs) && segs[h.n].n == h.n && h.seq > start.seq &&
		(h.n == 0 || headerOK(st.fs, segs[h.n].path)) && snapshotAt(st.fs, segs[h.n].path, h) {
		start = h
	} else if start.n < 0 || !snapshotAt(st.fs, segs[start.n].path, start) {
		return 0, nil
	}
	b, err := readFrame(st.fs, segs[0].path, headerSize)
	if err != nil || b[0] != KindOpening {
		return 0, nil
	}
	var orec pb.JournalRecord
	if proto.Unmarshal(b, &orec) != nil || orec.GetOpening() == nil {
		return 0, nil
	}
	sc := st.sc
	sc.Opening, sc.FromSegment, sc.FromOffset = orec.GetOpening(), start.n, start.at
	sc.LastSequence, sc.Pairs = start.seq, int(start.seq)
	if st.v.Opening != nil {
		if err := st.v.Opening(sc.Opening); err != nil {
			return 0, err
		}
	}
	return start.n, nil
}

// snapshotAt reports whether the segment at path holds, at s.at, a whole
// snapshot record of input s.seq whose CRC-32C matches.
func snapshotAt(fsys FS, path string, s snapshotHint) bool {
	b, err := readFrame(fsys, path, s.at)
	return err == nil && b[0] == KindSnapshot && leadingVarint(b) == s.seq
}

// headerOK reports whether the segment at path starts with a valid header.
func headerOK(fsys FS, path string) bool {
	f, err := fsys.OpenFile(path, os.O_RDONLY, 0)
	if err != nil {
		return false
	}
	defer f.Close()
	var h [headerSize]byte
	_, err = io.ReadFull(f, h[:])
	return err == nil && checkHeader(h[:]) == nil
}

// readFrame reads the frame at off of the file at path and returns its
// payload when it is whole and its CRC-32C matches: from segment 0 at
// headerSize, also the header is checked.
func readFrame(fsys FS, path string, off int64) ([]byte, error) {
	f, err := fsys.OpenFile(path, os.O_RDONLY, 0)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	var fr [headerSize]byte
	if off == headerSize {
		if _, err := io.ReadFull(f, fr[:headerSize]); err != nil {
			return nil, err
		}
		if err := checkHeader(fr[:]); err != nil {
			return nil, err
		}
	} else if err := skip(f, off); err != nil {
		return nil, err
	}
	if _, err := io.ReadFull(f, fr[:frameSize]); err != nil {
		return nil, err
	}
	size := binary.LittleEndian.Uint32(fr[:])
	if reason := checkLength(size); reason != "" {
		return nil, errors.New(reason)
	}
	b := make([]byte, size)
	if _, err := io.ReadFull(f, b); err != nil {
		return nil, err
	}
	if crc32.Checksum(b, castagnoli) != binary.LittleEndian.Uint32(fr[4:]) {
		return nil, errors.New("CRC-32C mismatch")
	}
	return b, nil
}

// Verify reads the sealed segments 0 to through of a robot's journal in
// fsys (nil: OS), which a restore from a snapshot did not read
// (Scan.FromSegment), and checks them as ReadFS does: every frame's
// CRC-32C, the opening record, the continuity of segments and inputs, and
// each segment's size and last input against what the manifest recorded
// when it was sealed. It writes nothing: damage is reported where it is
// (DamageError.Kept is empty), as a read-only scan does. Damage is in
// Scan.Damage; a break of continuity is the error (wrapping ErrGap), as
// from ReadFS. The end of ctx stops it between segments, with its error.
//
// When upTo > 0, segment through is the one being written, which a restore
// started from at the snapshot at byte upTo (the snapshot hint): it is
// read only up to that byte, while the writer appends after it, and its
// last input there must be the snapshot's.
func Verify(ctx context.Context, fsys FS, dir, robot string, through int, upTo int64) (Scan, error) {
	var sc Scan
	fsys = orOS(fsys)
	st := &scanState{fs: fsys, sc: &sc, v: Visitor{ReadOnly: true}, ctx: ctx}
	last := SegmentPath(dir, robot, through)
	if upTo > 0 {
		st.fs = prefixFS{FS: fsys, path: last, n: upTo}
	}
	segs, err := st.open(dir, robot, robot)
	if err != nil {
		return sc, err
	}
	n := 0
	for n < len(segs) && segs[n].n <= through {
		n++
	}
	if err := st.segments(segs[:n], false); err != nil {
		return sc, err
	}
	if sc.Opening == nil {
		return sc, errors.Join(fmt.Errorf("journal for %s has no opening record: its first segment %s holds none", robot, segs[0].path), st.gap)
	}
	if upTo > 0 && st.gap == nil {
		b, err := readFrame(fsys, last, upTo)
		if err == nil && (b[0] != KindSnapshot || leadingVarint(b) != sc.LastSequence) {
			err = fmt.Errorf("a snapshot at input %d follows input %d", leadingVarint(b), sc.LastSequence)
		}
		if err != nil {
			st.gap = fmt.Errorf("%w: %s at byte %d: the snapshot the restore started from: %v", ErrGap, last, upTo, err)
		}
	}
	return sc, st.gap
}

// fromSnapshot hands a Snapshot visitor the last snapshot and the pairs
// after it.
func (st *scanState) fromSnapshot() error {
	if st.v.Snapshot == nil {
		return nil
	}
	if st.snap != nil {
		var rec pb.JournalRecord
		if err := proto.Unmarshal(st.snap, &rec); err != nil {
			return fmt.Errorf("snapshot: %w", err)
		}
		s := rec.GetSnapshot()
		st.sc.SnapshotSequence = s.GetSequence()
		if err := st.v.Snapshot(s); err != nil {
			return err
		}
	}
	for i := 0; i+1 < len(st.kept); i += 2 {
		if err := st.pair(st.kept[i], st.kept[i+1]); err != nil {
			return err
		}
	}
	return nil
}

// noteGap notes a continuity break; it stops the visitor unless v.Gap
// lets the scan go on.
func (st *scanState) noteGap(err error) error {
	if st.gap == nil {
		st.gap = err
	}
	if st.stopped {
		return nil
	}
	if st.v.Gap == nil {
		st.stopped = true
		return nil
	}
	return st.v.Gap(err)
}

func (st *scanState) firstDamage() error {
	if len(st.sc.Damage) == 0 {
		return nil
	}
	return st.sc.Damage[0]
}

// pair decodes an input and its output and hands them to the visitor.
func (st *scanState) pair(inB, outB []byte) error {
	in, err := st.input(inB)
	if err != nil {
		return fmt.Errorf("journal input: %w", err)
	}
	if st.v.Input != nil {
		st.sc.Replayed++
		return st.v.Input(in)
	}
	if st.v.Pair == nil {
		return nil
	}
	var rout pb.JournalRecord
	if err := proto.Unmarshal(outB, &rout); err != nil {
		return fmt.Errorf("journal output: %w", err)
	}
	st.sc.Replayed++
	return st.v.Pair(in, rout.GetOutput())
}

// input decodes an input record. The writer puts the input message as the
// record's one field, which is decoded straight into a JournalInput (taken
// from a block of inputBlock: a replay decodes a million), without the
// record around it, by hand for odometry and IMU headings (inputDecoder);
// any other record is decoded whole.
func (st *scanState) input(b []byte) (*pb.JournalInput, error) {
	if v, n := protowire.ConsumeBytes(b[1:]); b[0] == KindInput && n > 0 && 1+n == len(b) {
		if len(st.inputs) == 0 {
			st.inputs = make([]pb.JournalInput, inputBlock)
		}
		in := &st.inputs[0]
		st.inputs = st.inputs[1:]
		if st.dec.decode(v, in) {
			return in, nil
		}
		return in, proto.Unmarshal(v, in)
	}
	var rec pb.JournalRecord
	if err := proto.Unmarshal(b, &rec); err != nil {
		return nil, err
	}
	return rec.GetInput(), nil
}

// inputBlock is the number of JournalInputs allocated at once.
const inputBlock = 128

// segment scans one segment file from byte from (0: its header; else a
// record the manifest names): first is segment 0, last the last one found.
func (st *scanState) segment(path string, first, last bool, from int64) error {
	var reuse []byte
	if st.v.Snapshot == nil {
		reuse = st.buf
	}
	// The segment is read a piece at a time while its frames are scanned:
	// a frame is scanned once it is whole in what was read, and anything
	// that is not a valid frame (damage, a torn tail) only once the whole
	// file is read, as if it had been read at once.
	rd, err := openSegment(st.fs, path, reuse, from)
	if err != nil {
		return err
	}
	defer rd.close()
	b := rd.b
	defer func() { st.buf = b }()
	sc := st.sc
	st.seg = sealedSegment{n: sc.Segment, snapAt: -1}
	damaged := len(sc.Damage)
	if err := st.frames(rd, path, first, last, from); err != nil {
		return err
	}
	b = rd.b
	st.seg.size, st.seg.last = int64(len(b))+rd.zeros, sc.LastSequence
	if last {
		sc.lastSeg = st.seg
		return nil
	}
	sc.sealed = append(sc.sealed, st.seg)
	// A segment that differs from its record without damage in it (cut
	// or grown at a frame's end) is damage too; damage found in it
	// already says what changed.
	if r, ok := st.man.recorded(st.seg.n); ok && len(sc.Damage) == damaged && (r.size != st.seg.size || r.last != st.seg.last) {
		st.sc.Damage = append(st.sc.Damage, &DamageError{File: path, Offset: min(r.size, st.seg.size), Length: max(r.size, st.seg.size) - min(r.size, st.seg.size),
			Reason: fmt.Sprintf("the segment is %d bytes and ends after input %d; the manifest recorded %d bytes and input %d when it was sealed", st.seg.size, st.seg.last, r.size, r.last)})
	}
	return nil
}

// frames scans the frames of a segment being read by rd (segment).
func (st *scanState) frames(rd *segmentReader, path string, first, last bool, from int64) error {
	b := rd.b
	sc := st.sc
	off, reason := headerSize, ""
	if from > 0 {
		off = int(from)
	} else if len(b) < headerSize {
		reason = fmt.Sprintf("header cut after %d of %d bytes", len(b), headerSize)
	} else if err := checkHeader(b); err != nil {
		reason = err.Error()
	}
	if reason != "" && !rd.full && from == 0 {
		if err := rd.rest(path, 0); err != nil {
			return err
		}
		b = rd.b
		reason = ""
		if len(b) < headerSize {
			reason = fmt.Sprintf("header cut after %d of %d bytes", len(b), headerSize)
		} else if err := checkHeader(b); err != nil {
			reason = err.Error()
		}
	}
	if reason != "" {
		// A bad header: damage up to the first valid frame.
		off = resync(b, 0)
		if off < 0 {
			sc.Good = 0
			return st.tail(path, b, 0, reason, last, rd.zeros)
		}
		if err := st.damage(path, b, 0, off, reason); err != nil {
			return err
		}
	}
	sc.Good = int64(off)
	for off < len(b) || !rd.full {
		if !rd.full && !frameWhole(b, off) {
			if err := rd.next(); err != nil {
				return err
			}
			b = rd.b
			continue
		}
		end, reason := frameAt(b, off)
		if reason != "" && !rd.full {
			if err := rd.rest(path, off); err != nil {
				return err
			}
			b = rd.b
			continue
		}
		if reason == "" {
			if err := st.record(path, first, b[off+frameSize:end], int64(end)); err != nil {
				return err
			}
			off = end
			continue
		}
		next := resync(b, off+1)
		if next < 0 {
			return st.tail(path, b, off, reason, last, rd.zeros)
		}
		if err := st.damage(path, b, off, next, reason); err != nil {
			return err
		}
		off = next
	}
	if st.pending != nil {
		// An input without its output at the end: never acknowledged in
		// the last segment; in another, the gap shows at the next input.
		if last {
			sc.Unanswered = true
			sc.Torn, sc.TornSegment = &TornError{sc.Good, "input without its output at the end"}, path
		}
		st.pending = nil
	}
	return nil
}

// tail takes the bytes from off to the end of a segment, where no valid
// frame follows a bad one: the torn tail of the last segment, or damage at
// the end of another. zeros counts the zero bytes past the end of b, of a
// file too large to read whole (segmentReader.rest): they are spare, or
// part of the torn tail or damage, but never kept.
func (st *scanState) tail(path string, b []byte, off int, reason string, last bool, zeros int64) error {
	if !last {
		if zeros > 0 {
			reason += fmt.Sprintf(" (then %d bytes of zeros to the end of the file, not kept)", zeros)
		}
		return st.damage(path, b, off, len(b), reason)
	}
	sc := st.sc
	rest := b[off:]
	if off > 0 && int64(off) == sc.Good && st.pending == nil && allZero(rest) {
		sc.Spare = int64(len(rest)) + zeros
		return nil
	}
	sc.Torn, sc.TornSegment = &TornError{int64(off), reason}, path
	sc.Unanswered = st.pending != nil
	st.pending = nil
	// The zeros at the end are the unused reserve of a segment appended to
	// by a copy (or a file system's zero fill): not kept.
	rest = bytes.TrimRight(rest, "\x00")
	if len(rest) == 0 || (off == 0 && bytes.HasPrefix(header(), rest)) || cutShort(rest) {
		// Nothing written, the start of a header, or a frame whose write
		// was cut short: never acknowledged, and what a reader of a journal
		// being written meets at its end.
		return nil
	}
	var err error
	sc.TornKept, err = st.keep(path, b, off, off+len(rest))
	return err
}

// cutShort reports whether b is the start of a frame that runs past the
// end of b.
func cutShort(b []byte) bool {
	if len(b) < frameSize {
		return true
	}
	size := binary.LittleEndian.Uint32(b)
	return checkLength(size) == "" && int(size) > len(b)-frameSize
}

func allZero(b []byte) bool {
	for _, c := range b {
		if c != 0 {
			return false
		}
	}
	return true
}

// damage keeps the damaged range [off, end) of the segment aside and
// reports it.
func (st *scanState) damage(path string, b []byte, off, end int, reason string) error {
	d := &DamageError{File: path, Offset: int64(off), Length: int64(end - off), Reason: reason}
	if end > off {
		var err error
		if d.Kept, err = st.keep(path, b, off, end); err != nil {
			return err
		}
	}
	st.sc.Damage = append(st.sc.Damage, d)
	st.damaged = true
	st.pending = nil // an input whose output was lost: the gap shows at the next input
	return nil
}

// keep copies b[off:end] of the segment at path into
// {path}.damaged-{off}, unless an earlier scan did, and returns its path.
func (st *scanState) keep(path string, b []byte, off, end int) (string, error) {
	if st.v.ReadOnly {
		return "", nil
	}
	name := fmt.Sprintf("%s.damaged-%d", path, off)
	if fi, err := st.fs.Stat(name); err == nil && fi.Size() == int64(end-off) {
		return name, nil
	}
	name, err := asideName(st.fs, name)
	if err == nil {
		err = writeSynced(st.fs, name, b[off:end], os.O_WRONLY|os.O_CREATE|os.O_EXCL)
	}
	if err == nil {
		err = st.fs.SyncDir(filepath.Dir(path))
	}
	if err != nil {
		return "", fmt.Errorf("keeping the damaged bytes %d to %d of %s: %w", off, end, path, classify(err))
	}
	return name, nil
}

// frameWhole reports whether the frame at off is whole in b, or its
// length out of bounds (frameAt then says why).
func frameWhole(b []byte, off int) bool {
	if len(b)-off < frameSize {
		return false
	}
	size := binary.LittleEndian.Uint32(b[off:])
	return checkLength(size) != "" || off+frameSize+int(size) <= len(b)
}

// frameAt checks the frame at off in b: its length, that it is whole, and
// its CRC-32C. It returns the frame's end, or why it is bad.
func frameAt(b []byte, off int) (end int, reason string) {
	if len(b)-off < frameSize {
		return 0, fmt.Sprintf("frame cut after %d of %d bytes", len(b)-off, frameSize)
	}
	size := binary.LittleEndian.Uint32(b[off:])
	if reason := checkLength(size); reason != "" {
		return 0, reason
	}
	end = off + frameSize + int(size)
	if end > len(b) {
		return 0, fmt.Sprintf("record cut after %d of %d bytes", len(b)-off-frameSize, size)
	}
	if crc32.Checksum(b[off+frameSize:end], castagnoli) != binary.LittleEndian.Uint32(b[off+4:]) {
		return 0, "CRC-32C mismatch"
	}
	return end, ""
}

// resync returns the offset of the first frame at or after from whose
// length is in bounds, whose CRC-32C matches and whose payload decodes as
// a record of a known kind, or -1. In the manner of the recovery of
// LevelDB's and pebble's record logs, which skip to the next chunk that
// checks; here every byte offset is tried, as the format has no blocks.
func resync(b []byte, from int) int {
	var rec pb.JournalRecord
	for p := from; p+frameSize < len(b); p++ {
		size := int(binary.LittleEndian.Uint32(b[p:]))
		if size == 0 || size > MaxRecordBytes || size > len(b)-p-frameSize || !knownKind(b[p+frameSize]) {
			continue
		}
		payload := b[p+frameSize : p+frameSize+size]
		if crc32.Checksum(payload, castagnoli) != binary.LittleEndian.Uint32(b[p+4:]) {
			continue
		}
		if proto.Unmarshal(payload, &rec) == nil {
			return p
		}
	}
	return -1
}

// record takes one record's payload b, which ends at byte end of the
// segment at path.
func (st *scanState) record(path string, first bool, b []byte, end int64) error {
	sc := st.sc
	switch b[0] {
	case KindOpening:
		return st.opening(path, first, b, end)
	case KindInput:
		if sc.Opening == nil && !st.damaged {
			return fmt.Errorf("%s: an input before the opening record", path)
		}
		if st.pending != nil {
			return fmt.Errorf("%s: an input without its output", path)
		}
		if seq := leadingVarint(b); seq != sc.LastSequence+1 {
			if err := st.noteGap(fmt.Errorf("%w: %s at byte %d: input %d follows input %d", ErrGap, path, end, seq, sc.LastSequence)); err != nil {
				return err
			}
		}
		st.pending = b
	case KindOutput:
		return st.output(path, b, end)
	case KindSnapshot:
		return st.snapshot(path, b, end)
	case KindClosing:
		sc.Closed = true
		sc.Good = end
	default:
		return fmt.Errorf("%s: record of unknown kind 0x%02x at byte %d", path, b[0], end)
	}
	return nil
}

// leadingVarint returns the value of field 1 of the message a record
// holds when it is a varint that comes first (an input's or a snapshot's
// sequence number, as the writer puts it), else 0.
func leadingVarint(b []byte) uint64 {
	_, n := protowire.ConsumeVarint(b[1:]) // the record's one field's length
	if n < 0 || 1+n >= len(b) || b[1+n] != 1<<3|byte(protowire.VarintType) {
		return 0
	}
	v, m := protowire.ConsumeVarint(b[2+n:])
	if m < 0 {
		return 0
	}
	return v
}

// opening takes the opening record, which must come first in the first
// segment, and hands it to the visitor.
func (st *scanState) opening(path string, first bool, b []byte, end int64) error {
	sc := st.sc
	if !first || sc.Opening != nil {
		return fmt.Errorf("%s: an opening record inside the journal", path)
	}
	var rec pb.JournalRecord
	if err := proto.Unmarshal(b, &rec); err != nil {
		return fmt.Errorf("%s: opening record: %w", path, err)
	}
	sc.Opening = rec.GetOpening()
	sc.Good = end
	if st.v.Opening != nil {
		return st.v.Opening(sc.Opening)
	}
	return nil
}

// output completes the pending input: the pair goes to the visitor, or,
// when the scan starts from a snapshot, is kept until the last one is
// known. After a gap the visitor gets nothing.
func (st *scanState) output(path string, b []byte, end int64) error {
	sc := st.sc
	if st.pending == nil {
		if st.damaged {
			return nil // its input was lost to damage: the gap shows at the next input
		}
		return fmt.Errorf("%s: an output without its input", path)
	}
	sc.Pairs++
	sc.Good = end
	pending := st.pending
	st.pending = nil
	sc.LastSequence = leadingVarint(pending) // a break was noted at the input
	switch {
	case st.stopped:
		return nil
	case st.v.Snapshot != nil:
		st.kept = append(st.kept, pending, b)
		return nil
	}
	return st.pair(pending, b)
}

// snapshot notes a snapshot record, whose sequence must be the last
// input's; with a Snapshot visitor it becomes the newest starting point
// and the pairs kept before it are dropped.
func (st *scanState) snapshot(path string, b []byte, end int64) error {
	if st.pending != nil {
		return fmt.Errorf("%s: a snapshot between an input and its output", path)
	}
	seq := leadingVarint(b)
	if seq != st.sc.LastSequence {
		if err := st.noteGap(fmt.Errorf("%w: %s at byte %d: a snapshot at input %d follows input %d", ErrGap, path, end, seq, st.sc.LastSequence)); err != nil {
			return err
		}
	}
	st.sc.Good = end
	st.seg.snapAt, st.seg.snapSeq = end-frameSize-int64(len(b)), seq
	if st.v.Snapshot != nil && !st.stopped {
		st.snap = b
		st.kept = st.kept[:0]
	}
	return nil
}

var idPattern = regexp.MustCompile(`^[a-z][a-z0-9-]{0,62}$`)

// ValidID reports whether id is 1 to 63 lower-case letters, digits and
// hyphens, starting with a letter: safe as the start of a file name on
// every file system, and what the service accepts as a robot id.
func ValidID(id string) bool { return idPattern.MatchString(id) }
