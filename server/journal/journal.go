package journal

import (
	"bufio"
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// The journal file format (DESIGN.md, "Recording"): a 16-byte header, the
// magic "RECKONJ1", a little-endian uint32 version and four reserved zero
// bytes; then records, each a little-endian uint32 length, a little-endian
// uint32 CRC-32C of the payload and the payload, a JournalRecord message.
const (
	journalMagic   = "RECKONJ1"
	journalVersion = 1
	headerSize     = 16
	frameSize      = 8
	// MaxRecordBytes bounds one record; a longer length is corruption.
	MaxRecordBytes = 4 << 20
	// Ext is the extension of journal segment files.
	Ext = ".rjl"
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// PoseEvery is how often a journal output carries the fused pose: on the
// outputs of inputs whose sequence number is a multiple of it. Every output
// carries its verdict; the poses in between follow from replay.
const PoseEvery = 50

// ErrBadHeader reports a file that is not a journal of a version we read.
var ErrBadHeader = errors.New("not a reckon journal")

// TornError reports a journal whose tail is truncated or corrupt: every
// record before Offset is good.
type TornError struct {
	Offset int64
	Reason string
}

// Error says where the journal tears and why.
func (e *TornError) Error() string {
	return fmt.Sprintf("journal torn at byte %d: %s", e.Offset, e.Reason)
}

func header() []byte {
	h := make([]byte, headerSize)
	copy(h, journalMagic)
	binary.LittleEndian.PutUint32(h[8:], journalVersion)
	return h
}

// Reader reads records from a journal file.
type Reader struct {
	r    *bufio.Reader
	good int64 // offset just past the last good record
	rb   bytes.Buffer
}

// NewReader checks the header and returns a reader of the records.
func NewReader(r io.Reader) (*Reader, error) {
	br := bufio.NewReaderSize(r, 1<<16)
	h := make([]byte, headerSize)
	if _, err := io.ReadFull(br, h); err != nil {
		return nil, fmt.Errorf("%w: header: %v", ErrBadHeader, err)
	}
	if string(h[:8]) != journalMagic {
		return nil, fmt.Errorf("%w: magic %q", ErrBadHeader, h[:8])
	}
	if v := binary.LittleEndian.Uint32(h[8:]); v != journalVersion {
		return nil, fmt.Errorf("%w: version %d, this build reads %d", ErrBadHeader, v, journalVersion)
	}
	return &Reader{r: br, good: headerSize}, nil
}

// Offset returns the offset just past the last good record.
func (jr *Reader) Offset() int64 { return jr.good }

// Next returns the next record, io.EOF at a clean end, or a *TornError.
func (jr *Reader) Next() (*pb.JournalRecord, error) {
	b, err := jr.NextRaw()
	if err != nil {
		return nil, err
	}
	rec := &pb.JournalRecord{}
	if err := proto.Unmarshal(b, rec); err != nil {
		jr.good -= frameSize + int64(len(b))
		return nil, &TornError{jr.good, fmt.Sprintf("record does not decode: %v", err)}
	}
	return rec, nil
}

// Record kinds as the first byte of a record's payload: the protobuf tag of
// the one JournalRecord field that is set (field number << 3 | 2).
const (
	KindOpening  = 1<<3 | 2
	KindInput    = 2<<3 | 2
	KindOutput   = 3<<3 | 2
	KindClosing  = 4<<3 | 2
	KindSnapshot = 5<<3 | 2
)

// NextRaw returns the next record's payload, checked against its CRC but
// not decoded; it is valid until the next call.
func (jr *Reader) NextRaw() ([]byte, error) {
	var fr [frameSize]byte
	n, err := io.ReadFull(jr.r, fr[:])
	if err == io.EOF {
		return nil, io.EOF
	}
	if err != nil {
		return nil, &TornError{jr.good, fmt.Sprintf("frame cut after %d of %d bytes", n, frameSize)}
	}
	size := binary.LittleEndian.Uint32(fr[:4])
	sum := binary.LittleEndian.Uint32(fr[4:])
	if size > MaxRecordBytes {
		return nil, &TornError{jr.good, fmt.Sprintf("record length %d exceeds %d", size, MaxRecordBytes)}
	}
	// Grow the buffer as bytes arrive, so that a corrupt length does not
	// allocate megabytes for a record that is not there.
	jr.rb.Reset()
	if n, err := io.CopyN(&jr.rb, jr.r, int64(size)); err != nil {
		return nil, &TornError{jr.good, fmt.Sprintf("record cut after %d of %d bytes", n, size)}
	}
	b := jr.rb.Bytes()
	if crc32.Checksum(b, castagnoli) != sum {
		return nil, &TornError{jr.good, "CRC-32C mismatch"}
	}
	if len(b) == 0 {
		return nil, &TornError{jr.good, "empty record"}
	}
	jr.good += frameSize + int64(size)
	return b, nil
}

// AppendFrame appends the framed encoding of rec to dst.
func AppendFrame(dst []byte, rec *pb.JournalRecord) ([]byte, error) {
	start := len(dst)
	dst = append(dst, make([]byte, frameSize)...)
	dst, err := proto.MarshalOptions{Deterministic: true}.MarshalAppend(dst, rec)
	return sealFrame(dst, start, err)
}

// sealFrame fills in the length and CRC of the frame that starts at start,
// or takes it back after a marshalling error.
func sealFrame(dst []byte, start int, err error) ([]byte, error) {
	if err != nil {
		return dst[:start], err
	}
	payload := dst[start+frameSize:]
	if len(payload) > MaxRecordBytes {
		return dst[:start], fmt.Errorf("journal record of %d bytes exceeds %d", len(payload), MaxRecordBytes)
	}
	binary.LittleEndian.PutUint32(dst[start:], uint32(len(payload)))
	binary.LittleEndian.PutUint32(dst[start+4:], crc32.Checksum(payload, castagnoli))
	return dst, nil
}

// Options configure a journal writer.
type Options struct {
	// SyncEach fsyncs after every append; otherwise the owner calls Sync.
	SyncEach bool
	// SegmentBytes starts a new segment file past this size (0: 64 MiB).
	SegmentBytes int64
}

// Writer appends records to a robot's journal segments
// dir/{robot}.{n}.rjl. It is not safe for concurrent use.
type Writer struct {
	dir, robot string
	opt        Options
	f          *os.File
	seg        int
	size       int64
	buf        []byte
	dirty      bool
}

// SegmentPath returns the path of segment n of a robot's journal.
func SegmentPath(dir, robot string, n int) string {
	return filepath.Join(dir, fmt.Sprintf("%s.%06d%s", robot, n, Ext))
}

// Segments lists a robot's journal segments in order.
func Segments(dir, robot string) ([]string, error) {
	m, err := filepath.Glob(filepath.Join(dir, robot+".[0-9][0-9][0-9][0-9][0-9][0-9]"+Ext))
	if err != nil {
		return nil, err
	}
	sort.Strings(m)
	return m, nil
}

// Robots lists the robot ids that have journals in dir.
func Robots(dir string) ([]string, error) {
	m, err := filepath.Glob(filepath.Join(dir, "*.[0-9][0-9][0-9][0-9][0-9][0-9]"+Ext))
	if err != nil {
		return nil, err
	}
	seen := map[string]bool{}
	var out []string
	for _, p := range m {
		b := filepath.Base(p)
		id := b[:len(b)-len(Ext)-7]
		if !seen[id] {
			seen[id] = true
			out = append(out, id)
		}
	}
	sort.Strings(out)
	return out, nil
}

// Create starts a new journal for robot with its opening record. It
// fails if the robot already has one, or if robot is not a valid id.
func Create(dir, robot string, opening *pb.JournalOpening, opt Options) (*Writer, error) {
	if !ValidID(robot) {
		return nil, fmt.Errorf("journal: robot id %q is not 1 to 63 lower-case letters, digits and hyphens, starting with a letter", robot)
	}
	if segs, _ := Segments(dir, robot); len(segs) > 0 {
		return nil, fmt.Errorf("journal for %s already exists in %s", robot, dir)
	}
	w := &Writer{dir: dir, robot: robot, opt: opt}
	if err := w.openSegment(0, true); err != nil {
		return nil, err
	}
	if err := w.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Opening{Opening: opening}}); err != nil {
		w.Close()
		return nil, err
	}
	return w, w.Sync()
}

// Resume reopens the last segment for appending at offset good (the
// end of its last good record), truncating anything after it.
func Resume(dir, robot string, seg int, good int64, opt Options) (*Writer, error) {
	w := &Writer{dir: dir, robot: robot, opt: opt, seg: seg}
	f, err := os.OpenFile(SegmentPath(dir, robot, seg), os.O_RDWR, 0)
	if err != nil {
		return nil, err
	}
	if err := f.Truncate(good); err != nil {
		f.Close()
		return nil, err
	}
	if _, err := f.Seek(good, io.SeekStart); err != nil {
		f.Close()
		return nil, err
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return nil, err
	}
	w.f, w.size = f, good
	return w, nil
}

func (w *Writer) openSegment(n int, exclusive bool) error {
	flags := os.O_WRONLY | os.O_CREATE
	if exclusive {
		flags |= os.O_EXCL
	}
	f, err := os.OpenFile(SegmentPath(w.dir, w.robot, n), flags, 0o644)
	if err != nil {
		return err
	}
	if _, err := f.Write(header()); err != nil {
		f.Close()
		return err
	}
	w.f, w.seg, w.size = f, n, headerSize
	return syncDir(w.dir)
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

// Append writes the records with one write, and fsyncs if SyncEach. When it
// returns nil the records are in the operating system's hands (and on disk
// with SyncEach): a crash of the process loses none of them.
func (w *Writer) Append(recs ...*pb.JournalRecord) error {
	if err := w.Add(recs...); err != nil {
		return err
	}
	return w.Flush()
}

// Add frames records into the writer's buffer without writing them; Flush
// writes what was added (group commit).
func (w *Writer) Add(recs ...*pb.JournalRecord) error {
	n := len(w.buf)
	var err error
	for _, r := range recs {
		if w.buf, err = AppendFrame(w.buf, r); err != nil {
			w.buf = w.buf[:n]
			return err
		}
	}
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
	return nil
}

// openFrame appends a frame's header (filled in by sealFrame), the record
// kind and the length of the record's one field; it returns the frame's
// start.
func openFrame(dst []byte, kind byte, size int) ([]byte, int) {
	start := len(dst)
	dst = append(dst, make([]byte, frameSize)...)
	dst = append(dst, kind)
	return protowire.AppendVarint(dst, uint64(size)), start
}

// appendInput appends the record of JournalInput{sequence = 1, sample = 2,
// arrival_unix_ns = 3, session_id = 4, client_sequence = 5}, leaving out
// zero scalars as protobuf does.
func appendInput(dst []byte, in EncodedInput) ([]byte, error) {
	seq, sample, arrivalUnixNs := in.Sequence, in.Sample, in.ArrivalUnixNs
	size := protowire.SizeTag(2) + protowire.SizeBytes(len(sample))
	if in.SessionID != "" {
		size += protowire.SizeTag(4) + protowire.SizeBytes(len(in.SessionID))
	}
	if in.ClientSequence != 0 {
		size += protowire.SizeTag(5) + protowire.SizeVarint(in.ClientSequence)
	}
	if seq != 0 {
		size += protowire.SizeTag(1) + protowire.SizeVarint(seq)
	}
	if arrivalUnixNs != 0 {
		size += protowire.SizeTag(3) + protowire.SizeVarint(uint64(arrivalUnixNs))
	}
	b, start := openFrame(dst, KindInput, size)
	if seq != 0 {
		b = protowire.AppendTag(b, 1, protowire.VarintType)
		b = protowire.AppendVarint(b, seq)
	}
	b = protowire.AppendTag(b, 2, protowire.BytesType)
	b = protowire.AppendBytes(b, sample)
	if arrivalUnixNs != 0 {
		b = protowire.AppendTag(b, 3, protowire.VarintType)
		b = protowire.AppendVarint(b, uint64(arrivalUnixNs))
	}
	if in.SessionID != "" {
		b = protowire.AppendTag(b, 4, protowire.BytesType)
		b = protowire.AppendString(b, in.SessionID)
	}
	if in.ClientSequence != 0 {
		b = protowire.AppendTag(b, 5, protowire.VarintType)
		b = protowire.AppendVarint(b, in.ClientSequence)
	}
	return sealFrame(b, start, nil)
}

// appendOutput appends the record of JournalOutput{response = 1, pose = 2}.
func appendOutput(dst []byte, response []byte, pose *pb.FusedPose) ([]byte, error) {
	opts := proto.MarshalOptions{Deterministic: true}
	size := protowire.SizeTag(1) + protowire.SizeBytes(len(response))
	poseSize := 0
	if pose != nil {
		poseSize = opts.Size(pose)
		size += protowire.SizeTag(2) + protowire.SizeBytes(poseSize)
	}
	b, start := openFrame(dst, KindOutput, size)
	b = protowire.AppendTag(b, 1, protowire.BytesType)
	b = protowire.AppendBytes(b, response)
	var err error
	if pose != nil {
		b = protowire.AppendTag(b, 2, protowire.BytesType)
		b = protowire.AppendVarint(b, uint64(poseSize))
		// Size above cached the size of every nested message.
		opts.UseCachedSize = true
		b, err = opts.MarshalAppend(b, pose)
	}
	return sealFrame(b, start, err)
}

// Flush writes the added records with one write, fsyncs if SyncEach, and
// rotates the segment if it is full.
func (w *Writer) Flush() error {
	if len(w.buf) == 0 {
		return nil
	}
	_, err := w.f.Write(w.buf)
	w.size += int64(len(w.buf))
	w.buf = w.buf[:0]
	if err != nil {
		return fmt.Errorf("journal %s: %w", w.f.Name(), err)
	}
	w.dirty = true
	if w.opt.SyncEach {
		if err := w.Sync(); err != nil {
			return err
		}
	}
	limit := w.opt.SegmentBytes
	if limit <= 0 {
		limit = 64 << 20
	}
	if w.size >= limit {
		if err := w.Sync(); err != nil {
			return err
		}
		if err := w.f.Close(); err != nil {
			return err
		}
		return w.openSegment(w.seg+1, true)
	}
	return nil
}

// Sync flushes the current segment to disk if anything was written.
func (w *Writer) Sync() error {
	if !w.dirty {
		return nil
	}
	w.dirty = false
	return w.f.Sync()
}

// Close syncs and closes the journal.
func (w *Writer) Close() error {
	if w.f == nil {
		return nil
	}
	err := w.Sync()
	if cerr := w.f.Close(); err == nil {
		err = cerr
	}
	w.f = nil
	return err
}

// Remove closes the journal and renames its segments to *.deleted, so that
// a deleted robot's record stays for review but is not restored.
func (w *Writer) Remove() error {
	if err := w.Close(); err != nil {
		return err
	}
	segs, err := Segments(w.dir, w.robot)
	if err != nil {
		return err
	}
	for _, s := range segs {
		if err := os.Rename(s, strings.TrimSuffix(s, Ext)+".deleted"); err != nil {
			return err
		}
	}
	return syncDir(w.dir)
}
