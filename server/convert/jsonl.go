package convert

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"

	"google.golang.org/protobuf/encoding/protojson"
	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// MaxLineBytes bounds one JSON Lines record.
const MaxLineBytes = 1 << 20

// byteOrderMark is U+FEFF in UTF-8, which some editors write at the start
// of a text file.
var byteOrderMark = []byte("\xef\xbb\xbf")

// ErrJSONL marks an error in a JSON Lines file.
var ErrJSONL = errors.New("JSON Lines")

// LineError is an error in a JSON Lines file at a line (counted from 1).
// errors.Is(err, ErrJSONL) is true for it.
type LineError struct {
	Line int
	Err  error
}

// Error renders "JSON Lines: line N: what".
func (e *LineError) Error() string {
	return fmt.Sprintf("%v: line %d: %v", ErrJSONL, e.Line, e.Err)
}

// Unwrap returns what was wrong.
func (e *LineError) Unwrap() error { return e.Err }

// Is makes errors.Is(err, ErrJSONL) true.
func (e *LineError) Is(target error) bool { return target == ErrJSONL }

// SampleReader reads samples from JSON Lines: one protojson Sample per
// line; blank lines and lines starting with # are skipped, and so is a
// UTF-8 byte order mark at the start of the file (RFC 8259, sec. 8.1). A
// file that starts with a UTF-16 byte order mark is refused at line 1,
// naming its encoding. A gzip-compressed file (RFC 1952; recordings are
// often kept as .jsonl.gz) is read through its decompression, its lines
// counted in the decompressed text; one compressed otherwise (zstd, xz,
// bzip2, zip) is refused at line 1, naming its format.
type SampleReader struct {
	sc   *bufio.Scanner
	src  *sniffReader
	line int
	// cut: the line read last ended at the end of the input without a
	// newline (a file still being written may end inside a line).
	cut bool
}

// NewSampleReader returns a reader of r.
func NewSampleReader(r io.Reader) *SampleReader {
	src := &sniffReader{r: r}
	sc := bufio.NewScanner(src)
	sc.Buffer(make([]byte, 64<<10), MaxLineBytes)
	sr := &SampleReader{sc: sc, src: src}
	sc.Split(sr.split)
	return sr
}

// split is bufio.ScanLines noting whether the line ended without a
// newline at the end of the input.
func (sr *SampleReader) split(data []byte, atEOF bool) (int, []byte, error) {
	n, tok, err := bufio.ScanLines(data, atEOF)
	sr.cut = tok != nil && atEOF && n == len(data) && data[n-1] != '\n'
	return n, tok, err
}

// Line returns the line number of the last sample read.
func (sr *SampleReader) Line() int { return sr.line }

// Next returns the next sample, or io.EOF. An error is a *LineError.
func (sr *SampleReader) Next() (*pb.Sample, error) {
	for sr.sc.Scan() {
		sr.line++
		b := sr.sc.Bytes()
		if sr.line == 1 {
			b = bytes.TrimPrefix(b, byteOrderMark)
			if bytes.HasPrefix(b, []byte("\xff\xfe")) || bytes.HasPrefix(b, []byte("\xfe\xff")) {
				return nil, &LineError{Line: 1, Err: fmt.Errorf("the file is UTF-16 (it starts with the byte order mark % x); JSON Lines are UTF-8: convert it, for instance with iconv -f UTF-16 -t UTF-8", b[:2])}
			}
		}
		b = bytes.TrimSpace(b)
		if bytes.HasPrefix(b, byteOrderMark) {
			return nil, &LineError{Line: sr.line, Err: errors.New("starts with a UTF-8 byte order mark (U+FEFF), which may only begin the file (were two files joined?)")}
		}
		if len(b) == 0 || b[0] == '#' {
			continue
		}
		if bytes.IndexByte(b, 0) >= 0 {
			// The parser would quote the NUL bytes into its message.
			return nil, &LineError{Line: sr.line, Err: fmt.Errorf("holds NUL bytes: a file whose writer lost power can end in zeros; the lines before this one were read whole, so cut the file before it (head -n %d)", sr.line-1)}
		}
		s := &pb.Sample{}
		if err := protojson.Unmarshal(b, s); err != nil {
			if sr.cut && sr.src.err != nil {
				// The decompression failed inside this line: say so rather
				// than that the file ends in it.
				return nil, &LineError{Line: sr.line, Err: sr.src.err}
			}
			if bytes.IndexByte(b, '\r') >= 0 {
				err = fmt.Errorf("%w; the line holds a carriage return (\\r) inside it: are the file's lines ended by a carriage return alone? End them with \\n or \\r\\n", err)
			} else if sr.cut {
				err = fmt.Errorf("%w; the file ends inside this line, without a newline: was it still being written?", err)
			}
			return nil, &LineError{Line: sr.line, Err: err}
		}
		if s.GetSample() == nil {
			return nil, &LineError{Line: sr.line, Err: errors.New("none of odometry, heading, fix, reseed and run_start is set")}
		}
		return s, nil
	}
	if err := sr.sc.Err(); err != nil {
		if errors.Is(err, bufio.ErrTooLong) {
			err = fmt.Errorf("longer than %d bytes, the longest line read", MaxLineBytes)
		}
		// The line that could not be read is the one after the last read.
		return nil, &LineError{Line: sr.line + 1, Err: err}
	}
	return nil, io.EOF
}

// WriteJSONLine writes m as one line of protojson.
func WriteJSONLine(w io.Writer, m proto.Message) error {
	b, err := protojson.MarshalOptions{UseProtoNames: true}.Marshal(m)
	if err != nil {
		return err
	}
	b = append(b, '\n')
	_, err = w.Write(b)
	return err
}

// OdometryToProto converts an odometry sample to the wire.
func OdometryToProto(o *fusion.Odometry) *pb.Sample {
	s := &pb.OdometrySample{StampNs: o.StampNs, StartNs: o.StartNs, ImuHeadingRad: o.IMUHeadingRad}
	switch {
	case o.Counts != nil:
		s.Motion = &pb.OdometrySample_Counts{Counts: &pb.WheelCounts{Counts: o.Counts}}
	case o.Step != nil:
		s.Motion = &pb.OdometrySample_Step{Step: &pb.BodyStep{ForwardM: o.Step.ForwardM, LeftM: o.Step.LeftM, TurnRad: o.Step.TurnRad}}
	default:
		s.Motion = &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: o.TravelM}}
	}
	return &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: s}}
}

// HeadingToProto converts an IMU heading sample to the wire.
func HeadingToProto(h *fusion.Heading) *pb.Sample {
	return &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: h.StampNs, HeadingRad: h.HeadingRad, VarianceRad2: h.VarRad2}}}
}

// FixToProto converts a fix to the wire.
func FixToProto(f *fusion.Fix) *pb.Sample {
	x := &pb.Fix{StampNs: f.StampNs, SensorId: f.SensorID}
	if f.Mount != nil {
		x.Mount = poseToProto(*f.Mount)
	}
	dim := 0
	switch f.Kind {
	case fusion.FixPose:
		x.Measurement, dim = &pb.Fix_Pose{Pose: &pb.PoseFix{XM: f.XM, YM: f.YM, HeadingRad: f.HeadingRad, Marker: f.Marker}}, 3
	case fusion.FixPosition:
		x.Measurement, dim = &pb.Fix_Position{Position: &pb.PositionFix{XM: f.XM, YM: f.YM}}, 2
	case fusion.FixHeading:
		x.Measurement, dim = &pb.Fix_Heading{Heading: &pb.HeadingFix{HeadingRad: f.HeadingRad}}, 1
	case fusion.FixLandmark:
		x.Measurement = &pb.Fix_Landmark{Landmark: &pb.LandmarkFix{LandmarkId: f.LandmarkID, RangeM: f.RangeM, BearingRad: f.BearingRad}}
		if f.RangeM != nil {
			dim++
		}
		if f.BearingRad != nil {
			dim++
		}
	}
	if len(f.Cov) > 0 {
		x.Covariance = &pb.Covariance{Dimension: uint32(dim), Values: f.Cov}
	}
	return &pb.Sample{Sample: &pb.Sample_Fix{Fix: x}}
}

// SampleStamp returns the stamp of any kind of sample, nanoseconds on the
// robot's time base (0 for a sample with none of them set, and for a run
// start, which has none: the new run's clock starts with the inputs after
// it).
func SampleStamp(s *pb.Sample) int64 {
	switch v := s.GetSample().(type) {
	case *pb.Sample_Odometry:
		return v.Odometry.GetStampNs()
	case *pb.Sample_Heading:
		return v.Heading.GetStampNs()
	case *pb.Sample_Fix:
		return v.Fix.GetStampNs()
	case *pb.Sample_Reseed:
		return v.Reseed.GetStampNs()
	}
	return 0 // none set, or a run start
}
