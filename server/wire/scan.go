package wire

import (
	"errors"
	"fmt"
	"io"
	"os"
	"regexp"
	"strconv"
	"strings"

	pb "reckon/proto/reckon/v1"
)

// JournalScan describes what ScanJournal found.
type JournalScan struct {
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
	Pairs      int
}

var segNum = regexp.MustCompile(`\.([0-9]{6})` + regexp.QuoteMeta(JournalExt) + `$`)

// ScanJournal reads a robot's journal segments in order and calls fn for
// every input with the output recorded after it. It stops at a torn or
// corrupt record and reports it; nothing before it is lost. An error from fn
// stops the scan and is returned.
//
// open is called with the opening record before any input.
func ScanJournal(dir, robot string, open func(*pb.JournalOpening) error, fn func(in *pb.JournalInput, out *pb.JournalOutput) error) (JournalScan, error) {
	var sc JournalScan
	segs, err := Segments(dir, robot)
	if err != nil {
		return sc, err
	}
	if len(segs) == 0 {
		return sc, fmt.Errorf("no journal for %s in %s", robot, dir)
	}
	for i, path := range segs {
		m := segNum.FindStringSubmatch(path)
		n, _ := strconv.Atoi(m[1])
		sc.Segment = n
		stop, err := scanSegment(path, i == 0, &sc, open, fn)
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
	return sc, nil
}

func scanSegment(path string, first bool, sc *JournalScan, open func(*pb.JournalOpening) error, fn func(*pb.JournalInput, *pb.JournalOutput) error) (stop bool, err error) {
	f, err := os.Open(path)
	if err != nil {
		return false, err
	}
	defer f.Close()
	jr, err := NewJournalReader(f)
	if err != nil {
		if first {
			return false, fmt.Errorf("%s: %w", path, err)
		}
		// A segment whose header was cut by a crash right after rotation.
		sc.Torn, sc.TornSegment, sc.Good = &TornError{0, err.Error()}, path, 0
		return true, nil
	}
	sc.Good = jr.Offset()
	var pending *pb.JournalInput
	for {
		rec, err := jr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		var torn *TornError
		if errors.As(err, &torn) {
			sc.Torn, sc.TornSegment = torn, path
			sc.Unanswered = pending != nil
			return true, nil
		}
		if err != nil {
			return false, err
		}
		switch e := rec.GetEntry().(type) {
		case *pb.JournalRecord_Opening:
			if !first || sc.Opening != nil {
				return false, fmt.Errorf("%s: an opening record inside the journal", path)
			}
			sc.Opening = e.Opening
			sc.Good = jr.Offset()
			if err := open(e.Opening); err != nil {
				return false, err
			}
		case *pb.JournalRecord_Input:
			if sc.Opening == nil {
				return false, fmt.Errorf("%s: an input before the opening record", path)
			}
			if pending != nil {
				return false, fmt.Errorf("%s: input %d has no output", path, pending.GetSequence())
			}
			pending = e.Input
		case *pb.JournalRecord_Output:
			if pending == nil {
				return false, fmt.Errorf("%s: an output without its input", path)
			}
			if err := fn(pending, e.Output); err != nil {
				return false, err
			}
			pending = nil
			sc.Pairs++
			sc.Good = jr.Offset()
		case *pb.JournalRecord_Closing:
			sc.Closed = true
			sc.Good = jr.Offset()
		}
	}
	if pending != nil {
		sc.Unanswered = true
		sc.Torn, sc.TornSegment = &TornError{sc.Good, "input without its output at the end"}, path
		return true, nil
	}
	return false, nil
}

// ID returns the {robot} part of "robots/{robot}".
func ID(name string) (string, error) {
	id, ok := strings.CutPrefix(name, "robots/")
	if !ok || !ValidID(id) {
		return "", fmt.Errorf("%q is not a robot name of the form robots/{robot}", name)
	}
	return id, nil
}

var idPattern = regexp.MustCompile(`^[a-z][a-z0-9-]{0,62}$`)

// ValidID reports whether id is 1 to 63 lower-case letters, digits and
// hyphens, starting with a letter.
func ValidID(id string) bool { return idPattern.MatchString(id) }
