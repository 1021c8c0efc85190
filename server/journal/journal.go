package journal

import (
	"bufio"
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// The journal file format (DEVELOPERS.md, "Design: Journal format"): a
// 16-byte header, the magic "RECKONJ1", a little-endian uint32 version and
// four reserved zero bytes; then records, each a little-endian uint32
// length, a little-endian uint32 CRC-32C of the payload and the payload, a
// JournalRecord message.
const (
	journalMagic   = "RECKONJ1"
	journalVersion = 1
	headerSize     = 16
	frameSize      = 8
	// MaxRecordBytes bounds one record; a longer length is corruption.
	MaxRecordBytes = 4 << 20
	// Ext is the extension of journal segment files.
	Ext = ".rjl"
	// tmpExt marks a file being made: it becomes its final name by a
	// rename once complete and synced, and is removed when left over.
	tmpExt = ".tmp"
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
	if err := checkHeader(h); err != nil {
		return nil, err
	}
	return &Reader{r: br, good: headerSize}, nil
}

// checkHeader checks a segment's first headerSize bytes.
func checkHeader(h []byte) error {
	if string(h[:8]) != journalMagic {
		return fmt.Errorf("%w: magic %q", ErrBadHeader, h[:8])
	}
	if v := binary.LittleEndian.Uint32(h[8:]); v != journalVersion {
		return fmt.Errorf("%w: version %d, this build reads %d", ErrBadHeader, v, journalVersion)
	}
	return nil
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
	if reason := checkLength(size); reason != "" {
		return nil, &TornError{jr.good, reason}
	}
	// Grow the buffer as bytes arrive, so that a corrupt length does not
	// allocate megabytes for a record that is not there.
	jr.rb.Reset()
	if n, err := io.CopyN(&jr.rb, jr.r, int64(size)); err != nil {
		return nil, &TornError{jr.good, fmt.Sprintf("record cut after %d of %d bytes", n, size)}
	}
	b := jr.rb.Bytes()
	if crc32.Checksum(b, castagnoli) != binary.LittleEndian.Uint32(fr[4:]) {
		return nil, &TornError{jr.good, "CRC-32C mismatch"}
	}
	jr.good += frameSize + int64(size)
	return b, nil
}

// checkLength says what is wrong with a frame's length ("": nothing).
func checkLength(size uint32) string {
	switch {
	case size == 0:
		return "empty record"
	case size > MaxRecordBytes:
		return fmt.Sprintf("record length %d exceeds %d", size, MaxRecordBytes)
	}
	return ""
}

// knownKind reports whether c is the first payload byte of a record kind
// this build reads.
func knownKind(c byte) bool {
	switch c {
	case KindOpening, KindInput, KindOutput, KindClosing, KindSnapshot:
		return true
	}
	return false
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
