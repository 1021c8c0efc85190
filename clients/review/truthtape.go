package review

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"

	"reckon.example/estimator"
)

// truthSource gives the truth at step i's stamp, for steps in increasing
// order: a truth file read again (truthReader) or the filtered walk's tape.
type truthSource interface {
	truthAt(i int, stampNs int64) (p estimator.Pose, ok bool, err error)
}

func (t *truthReader) truthAt(_ int, stampNs int64) (estimator.Pose, bool, error) {
	p, _, ok := t.at(stampNs)
	return p, ok, nil
}

// truthTapeRecord is the length of a tape's record: x, y and heading as
// their bits, and whether the truth covers the step.
const truthTapeRecord = 3*8 + 1

// truthTape keeps the truth the filtered walk found at each step, in a
// file in TempDir (25 bytes a step, 27 MB for an hour at 300 steps a
// second), for the walk after the smoother. A tape that fails to write
// is dropped, and that walk reads the truth file again.
type truthTape struct {
	f   *os.File
	w   *bufio.Writer
	n   int
	err error
	buf [truthTapeRecord]byte
}

func newTruthTape(dir string) *truthTape {
	f, err := createTemp(dir, "reckon-truth-*")
	if err != nil {
		return &truthTape{err: err}
	}
	return &truthTape{f: f, w: bufio.NewWriterSize(f, 256<<10)}
}

// add records the truth at the next step; a nil tape records nothing.
func (t *truthTape) add(p *estimator.Pose, ok bool) {
	if t == nil || t.err != nil {
		return
	}
	b := t.buf[:]
	binary.LittleEndian.PutUint64(b[0:], math.Float64bits(p.X))
	binary.LittleEndian.PutUint64(b[8:], math.Float64bits(p.Y))
	binary.LittleEndian.PutUint64(b[16:], math.Float64bits(p.Heading))
	b[24] = 0
	if ok {
		b[24] = 1
	}
	if _, err := t.w.Write(b); err != nil {
		t.err = err
		return
	}
	t.n++
}

// reader returns a reader of the tape from its start, once the walk has
// added n steps; an error if the tape does not hold them.
func (t *truthTape) reader(n int) (*truthTapeReader, error) {
	if t == nil {
		return nil, errors.New("review: no truth tape")
	}
	if t.err == nil {
		t.err = t.w.Flush()
	}
	if t.err != nil {
		return nil, t.err
	}
	if t.n != n {
		return nil, fmt.Errorf("review: the truth tape holds %d steps of %d", t.n, n)
	}
	return &truthTapeReader{r: bufio.NewReaderSize(io.NewSectionReader(t.f, 0, int64(n)*truthTapeRecord), 256<<10)}, nil
}

func (t *truthTape) close() {
	if t != nil && t.f != nil {
		t.f.Close()
		t.f = nil
	}
}

// truthTapeReader reads a tape forwards.
type truthTapeReader struct {
	r    *bufio.Reader
	next int
	buf  [truthTapeRecord]byte
}

func (tr *truthTapeReader) truthAt(i int, _ int64) (p estimator.Pose, ok bool, err error) {
	if i != tr.next {
		return p, false, fmt.Errorf("review: truth of step %d read after step %d", i, tr.next-1)
	}
	b := tr.buf[:]
	if _, err := io.ReadFull(tr.r, b); err != nil {
		return p, false, fmt.Errorf("review: truth tape: %w", err)
	}
	tr.next++
	p.X = math.Float64frombits(binary.LittleEndian.Uint64(b[0:]))
	p.Y = math.Float64frombits(binary.LittleEndian.Uint64(b[8:]))
	p.Heading = math.Float64frombits(binary.LittleEndian.Uint64(b[16:]))
	return p, b[24] == 1, nil
}
