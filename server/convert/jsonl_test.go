package convert

import (
	"bytes"
	"compress/gzip"
	"errors"
	"flag"
	"io"
	"os"
	"slices"
	"strings"
	"testing"
	"unicode/utf8"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

var rewrite = flag.Bool("rewrite", false, "rewrite golden files in testdata")

const exampleSamples = "../../testdata/samples/greenhouse-10s.jsonl"

// TestExampleSamples: the example JSON Lines file is ten seconds of the
// simulated greenhouse cart; it is regenerated with -rewrite and must read
// back and run through the estimator.
func TestExampleSamples(t *testing.T) {
	var buf bytes.Buffer
	buf.WriteString("# Ten seconds of the simulated greenhouse cart (reckon's simulator, seed 3, layout\n# free-wheel-turn with IMU): one reckon.v1.Sample in protojson per line, in arrival order.\n# Use with testdata/robots/free-wheel-turn.yaml. Simulated data, for examples only.\n")
	s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 3, DurationS: 10, OutlierFraction: 0.05, OdometryHz: 50, IMUHz: 25})
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		switch {
		case in.Odometry != nil:
			WriteJSONLine(&buf, OdometryToProto(in.Odometry))
		case in.Heading != nil:
			WriteJSONLine(&buf, HeadingToProto(in.Heading))
		default:
			WriteJSONLine(&buf, FixToProto(in.Fix))
		}
	}
	if *rewrite {
		os.MkdirAll("../../testdata/samples", 0o755)
		if err := os.WriteFile(exampleSamples, buf.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	f, err := os.Open(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	b, _ := os.ReadFile("../../testdata/robots/free-wheel-turn.yaml")
	_, cfg, err := LoadConfigYAML(b)
	if err != nil {
		t.Fatal(err)
	}
	r, _ := fusion.New(cfg)
	sr := NewSampleReader(f)
	n, applied := 0, 0
	want := NewSampleReader(bytes.NewReader(buf.Bytes()))
	for {
		s, err := sr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		w, _ := want.Next()
		if !proto.Equal(s, w) {
			t.Fatalf("line %d differs from the simulator's output; run go test -run TestExampleSamples -rewrite", sr.Line())
		}
		n++
		if resp, taken := Take(r, s, 0); taken && resp.GetStatusCode() == 0 {
			applied++
		}
	}
	if n < 500 || applied < n*9/10 {
		t.Errorf("%d samples, %d taken", n, applied)
	}
}

func TestSampleReaderErrors(t *testing.T) {
	cases := []struct {
		in, want string
		line     int
	}{
		{"{\"odometry\": {\"stamp_ns\": \"5\", \"travel\": {\"travel_m\": [0.1]}}}\n{not json}\n", "line 2", 2},
		{"# comment\n\n{\"fix\": {\"stamp_ns\": \"1\", \"colour\": 3}}\n", "line 3", 3},
		{"{}\n", "line 1: none of", 1},
		{strings.Repeat("x", MaxLineBytes+10), "line 1: longer than 1048576 bytes, the longest line read", 1},
		{"# comment\n" + strings.Repeat(" ", MaxLineBytes+10), "line 2: longer than 1048576 bytes", 2},
	}
	for _, c := range cases {
		sr := NewSampleReader(strings.NewReader(c.in))
		var err error
		for err == nil {
			_, err = sr.Next()
		}
		var le *LineError
		if errors.Is(err, io.EOF) || !errors.Is(err, ErrJSONL) || !strings.Contains(err.Error(), c.want) || !errors.As(err, &le) || le.Line != c.line {
			t.Errorf("%.40q: error %v, want %q at line %d", c.in, err, c.want, c.line)
		}
	}
}

// TestSampleReaderByteOrderMark: a file that starts with a UTF-8 byte
// order mark (as Windows editors save one) reads as the same file without
// it (RFC 8259, sec. 8.1: a parser may ignore one); one further on, as two
// such files joined leave it, is an error that names it instead of an
// invisible "invalid value".
func TestSampleReaderByteOrderMark(t *testing.T) {
	const bom = "\xef\xbb\xbf"
	const line = "{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n"
	for _, in := range []string{bom + line + line, bom + "# a comment\r\n" + line} {
		sr := NewSampleReader(strings.NewReader(in))
		s, err := sr.Next()
		if err != nil || s.GetHeading().GetHeadingRad() != 0.1 {
			t.Errorf("%q: %v, %v; want the heading", in, s, err)
		}
	}
	sr := NewSampleReader(strings.NewReader(line + bom + line))
	_, err := sr.Next()
	if err != nil {
		t.Fatal(err)
	}
	_, err = sr.Next()
	var le *LineError
	if !errors.As(err, &le) || le.Line != 2 || !strings.Contains(err.Error(), "byte order mark") {
		t.Errorf("a byte order mark on line 2: %v; want an error naming it at line 2", err)
	}
}

// FuzzSampleReader: any bytes give samples or an error naming a line, and
// every sample read goes through Take (decoding and the robot's checks)
// without a panic or a NaN.
func FuzzSampleReader(f *testing.F) {
	if b, err := os.ReadFile(exampleSamples); err == nil {
		f.Add(b[:min(len(b), 4000)])
	}
	f.Add([]byte("{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n"))
	// The same line gzip-compressed (RFC 1952), as a .jsonl.gz holds it,
	// whole and cut short.
	gz := gzipped(f, []byte("{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n"))
	f.Add(gz)
	f.Add(gz[:len(gz)-10])
	// A line, then the NUL bytes a logger that lost power leaves.
	f.Add([]byte("{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n{\"head\x00\x00\x00\x00"))
	f.Fuzz(func(t *testing.T, b []byte) {
		cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true}.Config()
		r, _ := fusion.New(cfg)
		sr := NewSampleReader(bytes.NewReader(b))
		for {
			s, err := sr.Next()
			if err != nil {
				return
			}
			Take(r, s, 0)
			if p := r.Pose(); p.Pose.X != p.Pose.X || p.Cov[0] != p.Cov[0] {
				t.Fatalf("NaN after line %d", sr.Line())
			}
		}
	})
}

// TestReadmeExamples: the JSON Lines shown in the README parse as samples.
func TestReadmeExamples(t *testing.T) {
	b, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	parts := strings.Split(string(b), "```json\n")
	if len(parts) < 2 {
		t.Fatal("no JSON example in the README")
	}
	block := strings.SplitN(parts[1], "```", 2)[0]
	sr := NewSampleReader(strings.NewReader(block))
	n := 0
	for {
		_, err := sr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("README example: %v", err)
		}
		n++
	}
	if n < 3 {
		t.Errorf("%d README example lines", n)
	}
}

// TestSampleReaderCutLine: a file read while it is still being written
// (feed of a recording in progress) can end inside its last line; the
// error says the line has no end instead of the parser's bare "unexpected
// EOF". A last line without a newline that parses is a sample.
func TestSampleReaderCutLine(t *testing.T) {
	const line = "{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}"
	sr := NewSampleReader(strings.NewReader(line + "\n" + line[:20]))
	if _, err := sr.Next(); err != nil {
		t.Fatal(err)
	}
	_, err := sr.Next()
	var le *LineError
	if !errors.As(err, &le) || le.Line != 2 || !strings.Contains(err.Error(), "the file ends inside this line") {
		t.Errorf("a file cut inside line 2: %v; want an error at line 2 saying it ends inside it", err)
	}
	sr = NewSampleReader(strings.NewReader(line + "\n" + line))
	for i := range 2 {
		if s, err := sr.Next(); err != nil || s.GetHeading() == nil {
			t.Errorf("sample %d: %v, %v", i+1, s, err)
		}
	}
	sr = NewSampleReader(strings.NewReader(line[:20] + "\n" + line + "\n"))
	if _, err := sr.Next(); err == nil || strings.Contains(err.Error(), "ends inside") {
		t.Errorf("a malformed line with its newline: %v; want an error that does not say the file ends in it", err)
	}
}

// TestSampleReaderUTF16: a samples file saved as UTF-16 (a Windows editor's
// "Unicode") is named as such at line 1, instead of the parser's "invalid
// value" followed by the raw bytes of its byte order mark. JSON exchanged
// between systems is UTF-8 (RFC 8259, sec. 8.1).
func TestSampleReaderUTF16(t *testing.T) {
	const line = "{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n"
	for _, bom := range []string{"\xff\xfe", "\xfe\xff"} {
		var b []byte
		for _, r := range line {
			if bom == "\xff\xfe" {
				b = append(b, byte(r), 0)
			} else {
				b = append(b, 0, byte(r))
			}
		}
		sr := NewSampleReader(bytes.NewReader(append([]byte(bom), b...)))
		_, err := sr.Next()
		var le *LineError
		if !errors.As(err, &le) || le.Line != 1 || !strings.Contains(err.Error(), "UTF-16") || !utf8.ValidString(err.Error()) {
			t.Errorf("% x: %q; want an error at line 1 naming UTF-16, in valid UTF-8", bom, err)
		}
	}
}

// TestSampleReaderCROnly: a file whose lines end in a carriage return
// alone (as old Mac editors write them) reads as one line; the error says
// that the line holds carriage returns instead of only the parser's
// "unexpected token" in its middle.
func TestSampleReaderCROnly(t *testing.T) {
	const line = "{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}"
	sr := NewSampleReader(strings.NewReader(line + "\r" + line + "\r"))
	_, err := sr.Next()
	var le *LineError
	if !errors.As(err, &le) || le.Line != 1 || !strings.Contains(err.Error(), "carriage return") || strings.Contains(err.Error(), "ends inside") {
		t.Errorf("lines ended by CR alone: %v; want an error at line 1 naming the carriage returns", err)
	}
}

// TestFixMarkerLine: a pose fix's marker goes through a JSON Lines file
// (FixToProto, WriteJSONLine, SampleReader) and Decode into fusion.Fix
// unchanged, as reckon feed and replays read it; the README's example
// line names one.
func TestFixMarkerLine(t *testing.T) {
	want := fusion.Fix{StampNs: 150e6, SensorID: "camera", Kind: fusion.FixPose, XM: 0.21, YM: 0.01, HeadingRad: 0.03, Marker: "row-end-e"}
	var buf bytes.Buffer
	if err := WriteJSONLine(&buf, FixToProto(&want)); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(buf.String(), `"marker":"row-end-e"`) {
		t.Errorf("line %s lacks the marker", buf.String())
	}
	s, err := NewSampleReader(&buf).Next()
	if err != nil {
		t.Fatal(err)
	}
	d, err := Decode(s)
	if err != nil {
		t.Fatal(err)
	}
	if d.Kind != fusion.InputFix || d.Fix.Marker != want.Marker || d.Fix.XM != want.XM {
		t.Errorf("decoded %+v, want %+v", d.Fix, want)
	}
	readme, _ := os.ReadFile("../../README.md")
	if !strings.Contains(string(readme), `"marker":"row-end-e"`) {
		t.Error("the README's example lines name no marker")
	}
}

// readAll reads every sample of sr up to its first error (io.EOF at the
// end), with the line of each.
func readAll(sr *SampleReader) (samples []*pb.Sample, lines []int, err error) {
	for {
		s, err := sr.Next()
		if err != nil {
			return samples, lines, err
		}
		samples, lines = append(samples, s), append(lines, sr.Line())
	}
}

func gzipped(t testing.TB, b []byte) []byte {
	t.Helper()
	var buf bytes.Buffer
	zw := gzip.NewWriter(&buf)
	if _, err := zw.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := zw.Close(); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

// TestSampleReaderGzip: a recording kept gzip-compressed (a .jsonl.gz, as
// robots' loggers rotate them; RFC 1952) reads as the same samples on the
// same lines as the file itself, and so do two such files joined (cat
// a.gz b.gz: a gzip file of two members, RFC 1952 sec. 2.2). A compressed
// file cut short gives the samples of its whole lines and then an error
// naming the decompression at the line it ends in, one with a damaged
// checksum an error naming the checksum; a file compressed in another
// format is refused at line 1, naming it. Before, a .jsonl.gz was refused
// at line 1 as "invalid value" and the file's lines said to end in a
// carriage return.
func TestSampleReaderGzip(t *testing.T) {
	plain, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	want, wantLines, err := readAll(NewSampleReader(bytes.NewReader(plain)))
	if !errors.Is(err, io.EOF) || len(want) < 500 {
		t.Fatalf("the example: %d samples, %v", len(want), err)
	}
	gz := gzipped(t, plain)
	got, gotLines, err := readAll(NewSampleReader(bytes.NewReader(gz)))
	if !errors.Is(err, io.EOF) || len(got) != len(want) || !slices.Equal(gotLines, wantLines) {
		t.Fatalf("gzip: %d samples, %v; want %d", len(got), err, len(want))
	}
	for i := range got {
		if !proto.Equal(got[i], want[i]) {
			t.Fatalf("gzip: sample %d (line %d) differs", i+1, gotLines[i])
		}
	}
	half := bytes.Index(plain[len(plain)/2:], []byte("\n")) + len(plain)/2 + 1
	joined := append(gzipped(t, plain[:half]), gzipped(t, plain[half:])...)
	if got, _, err := readAll(NewSampleReader(bytes.NewReader(joined))); !errors.Is(err, io.EOF) || len(got) != len(want) {
		t.Errorf("two gzip members: %d samples, %v; want %d", len(got), err, len(want))
	}

	cut := gz[:len(gz)*2/3]
	got, gotLines, err = readAll(NewSampleReader(bytes.NewReader(cut)))
	var le *LineError
	if !errors.As(err, &le) || !strings.Contains(err.Error(), "gzip") || !strings.Contains(err.Error(), "ends early") || len(got) < len(want)/3 {
		t.Fatalf("gzip cut short: %d samples, %v; want some and then an error naming the gzip ending early", len(got), err)
	}
	if le.Line <= gotLines[len(gotLines)-1] || le.Line > gotLines[len(gotLines)-1]+2 {
		t.Errorf("gzip cut short: error at line %d, the last sample read at line %d", le.Line, gotLines[len(gotLines)-1])
	}
	for i := range got {
		if !proto.Equal(got[i], want[i]) {
			t.Fatalf("gzip cut short: sample %d differs", i+1)
		}
	}

	damaged := bytes.Clone(gz)
	damaged[len(damaged)-6] ^= 0xff // in the CRC-32 of the trailer (RFC 1952, sec. 2.3.1)
	if _, _, err := readAll(NewSampleReader(bytes.NewReader(damaged))); !errors.As(err, &le) || !strings.Contains(err.Error(), "checksum") {
		t.Errorf("gzip with a damaged checksum: %v; want an error naming the checksum", err)
	}

	for name, head := range map[string][]byte{
		"zstd":  {0x28, 0xb5, 0x2f, 0xfd, 0x24, 0x04},
		"xz":    {0xfd, '7', 'z', 'X', 'Z', 0, 0, 4},
		"bzip2": []byte("BZh91AY&SY"),
		"zip":   []byte("PK\x03\x04\x14\x00"),
	} {
		_, err := NewSampleReader(bytes.NewReader(head)).Next()
		if !errors.As(err, &le) || le.Line != 1 || !strings.Contains(err.Error(), name+"-compressed") {
			t.Errorf("%s: %v; want an error at line 1 naming %s", name, err, name)
		}
	}
	// A file that begins "BZh" and is text is read as text.
	if _, err := NewSampleReader(strings.NewReader("BZh, no\n")).Next(); err == nil || strings.Contains(err.Error(), "compressed") {
		t.Errorf("text starting BZh: %v", err)
	}
}

// TestSampleReaderZeroTail: a recording whose logger lost power can end in
// NUL bytes where the file system had extended it but not yet written it
// (common practice: an SD card pulled from a robot that browned out), after
// a whole line or inside one. The error names the NUL bytes at that line
// and says how to keep the lines before it, instead of the parser's
// "invalid value" followed by the NUL bytes themselves.
func TestSampleReaderZeroTail(t *testing.T) {
	const line = "{\"heading\": {\"stamp_ns\": \"5\", \"heading_rad\": 0.1}}\n"
	zeros := strings.Repeat("\x00", 4096)
	for _, in := range []string{line + line + zeros, line + line + line[:20] + zeros, line + line + zeros + "\n" + line} {
		samples, _, err := readAll(NewSampleReader(strings.NewReader(in)))
		var le *LineError
		if len(samples) != 2 || !errors.As(err, &le) || le.Line != 3 || !strings.Contains(err.Error(), "NUL bytes") ||
			!strings.Contains(err.Error(), "head -n 2") || strings.ContainsRune(err.Error(), 0) {
			t.Errorf("%.60q...: %d samples, %q; want 2 and an error at line 3 naming the NUL bytes, without them", in, len(samples), err)
		}
	}
}
