package journal

import (
	"errors"
	"fmt"
	"io"
	"os"
	"regexp"
	"strconv"

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
	// Torn, if not nil, says where and why the journal was cut short;
	// DroppedSegments lists whole segments after a torn one.
	Torn            *TornError
	TornSegment     string
	DroppedSegments []string
	// Unanswered is true when the tail held an input without its output:
	// it was never acknowledged and is dropped with the tail.
	Unanswered bool
	Closed     bool
	// Pairs counts the inputs with their outputs in the journal; Replayed
	// those passed to Visitor.Pair (fewer when a snapshot was used).
	Pairs, Replayed int
	// SnapshotSequence is the sequence of the snapshot used (0: none).
	SnapshotSequence uint64
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
}

var segNum = regexp.MustCompile(`\.([0-9]{6})` + regexp.QuoteMeta(Ext) + `$`)

// scanState carries a scan across segments.
type scanState struct {
	sc      *Scan
	v       Visitor
	pending []byte   // an input's payload waiting for its output
	kept    [][]byte // with a Snapshot visitor: payloads since the last snapshot
	snap    []byte
}

// Read reads a robot's journal segments in order and hands the
// records to v. It stops at a torn or corrupt record and reports it; nothing
// before it is lost. An error from v stops the scan and is returned.
func Read(dir, robot string, v Visitor) (Scan, error) {
	var sc Scan
	segs, err := Segments(dir, robot)
	if err != nil {
		return sc, err
	}
	if len(segs) == 0 {
		return sc, fmt.Errorf("no journal for %s in %s", robot, dir)
	}
	st := &scanState{sc: &sc, v: v}
	for i, path := range segs {
		m := segNum.FindStringSubmatch(path)
		n, _ := strconv.Atoi(m[1])
		sc.Segment = n
		stop, err := st.segment(path, i == 0)
		if err != nil {
			return sc, err
		}
		if stop {
			sc.DroppedSegments = segs[i+1:]
			break
		}
	}
	if sc.Opening == nil {
		return sc, fmt.Errorf("journal for %s has no opening record", robot)
	}
	if v.Snapshot != nil {
		if st.snap != nil {
			var s pb.JournalSnapshot
			if err := proto.Unmarshal(st.snap, &s); err != nil {
				return sc, fmt.Errorf("snapshot: %w", err)
			}
			sc.SnapshotSequence = s.GetSequence()
			if err := v.Snapshot(&s); err != nil {
				return sc, err
			}
		}
		for i := 0; i+1 < len(st.kept); i += 2 {
			if err := st.pair(st.kept[i], st.kept[i+1]); err != nil {
				return sc, err
			}
		}
	}
	return sc, nil
}

// pair decodes an input and its output and hands them to the visitor.
func (st *scanState) pair(inB, outB []byte) error {
	var rin, rout pb.JournalRecord
	if err := proto.Unmarshal(inB, &rin); err != nil {
		return fmt.Errorf("journal input: %w", err)
	}
	if st.v.Input != nil {
		st.sc.Replayed++
		return st.v.Input(rin.GetInput())
	}
	if err := proto.Unmarshal(outB, &rout); err != nil {
		return fmt.Errorf("journal output: %w", err)
	}
	st.sc.Replayed++
	return st.v.Pair(rin.GetInput(), rout.GetOutput())
}

// segment scans one segment file; stop is true when it was torn, which
// ends the scan.
func (st *scanState) segment(path string, first bool) (stop bool, err error) {
	sc := st.sc
	f, err := os.Open(path)
	if err != nil {
		return false, err
	}
	defer f.Close()
	jr, err := NewReader(f)
	if err != nil {
		if first {
			return false, fmt.Errorf("%s: %w", path, err)
		}
		// A segment whose header was cut by a crash right after rotation.
		sc.Torn, sc.TornSegment, sc.Good = &TornError{0, err.Error()}, path, 0
		return true, nil
	}
	sc.Good = jr.Offset()
	for {
		b, err := jr.NextRaw()
		if errors.Is(err, io.EOF) {
			break
		}
		var torn *TornError
		if errors.As(err, &torn) {
			sc.Torn, sc.TornSegment = torn, path
			sc.Unanswered = st.pending != nil
			st.pending = nil
			return true, nil
		}
		if err != nil {
			return false, err
		}
		if err := st.record(path, first, b, jr.Offset()); err != nil {
			return false, err
		}
	}
	if st.pending != nil {
		sc.Unanswered = true
		sc.Torn, sc.TornSegment = &TornError{sc.Good, "input without its output at the end"}, path
		st.pending = nil
		return true, nil
	}
	return false, nil
}

// record takes one record's payload b, which ends at byte end of the
// segment at path.
func (st *scanState) record(path string, first bool, b []byte, end int64) error {
	sc := st.sc
	switch b[0] {
	case KindOpening:
		return st.opening(path, first, b, end)
	case KindInput:
		if sc.Opening == nil {
			return fmt.Errorf("%s: an input before the opening record", path)
		}
		if st.pending != nil {
			return fmt.Errorf("%s: an input without its output", path)
		}
		st.pending = append([]byte(nil), b...)
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
// when the scan starts from a snapshot, is kept until the last one is known.
func (st *scanState) output(path string, b []byte, end int64) error {
	sc := st.sc
	if st.pending == nil {
		return fmt.Errorf("%s: an output without its input", path)
	}
	sc.Pairs++
	sc.Good = end
	pending := st.pending
	st.pending = nil
	if st.v.Snapshot != nil {
		st.kept = append(st.kept, pending, append([]byte(nil), b...))
		return nil
	}
	return st.pair(pending, b)
}

// snapshot notes a snapshot record; with a Snapshot visitor it becomes the
// newest starting point and the pairs kept before it are dropped.
func (st *scanState) snapshot(path string, b []byte, end int64) error {
	if st.pending != nil {
		return fmt.Errorf("%s: a snapshot between an input and its output", path)
	}
	st.sc.Good = end
	if st.v.Snapshot == nil {
		return nil
	}
	var rec pb.JournalRecord
	if err := proto.Unmarshal(b, &rec); err != nil {
		return fmt.Errorf("%s: snapshot record: %w", path, err)
	}
	st.snap, _ = proto.Marshal(rec.GetSnapshot())
	st.kept = st.kept[:0]
	return nil
}

var idPattern = regexp.MustCompile(`^[a-z][a-z0-9-]{0,62}$`)

// ValidID reports whether id is 1 to 63 lower-case letters, digits and
// hyphens, starting with a letter: safe as the start of a file name on
// every file system, and what the service accepts as a robot id.
func ValidID(id string) bool { return idPattern.MatchString(id) }
