package review

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"math"
	"os"
	"reflect"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// Fixed-size little-endian records keep a long run's steps and smoothed
// states on disk, so that memory does not grow with the run. A record is
// sized for the run's state size k (every step of one robot has the same):
// a state is its size and angle set in one word, the mean (k) and the
// covariance (k x k); a step is its stamp, two states, the transition
// Jacobian (k x k) and the start flag.
const chunk = 2048 // records read at once

func stateBytes(k int) int { return 8 + (k+k*k)*8 }

func stepBytes(k int) int { return 8 + 2*stateBytes(k) + k*k*8 + 8 }

func putState(b []byte, s *estimator.State) []byte {
	k := s.Size()
	var v [estimator.MaxStates * estimator.MaxStates]float64
	b = binary.LittleEndian.AppendUint64(b, uint64(k)|uint64(s.Angles())<<32)
	s.MeanInto(v[:])
	for _, x := range v[:k] {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x))
	}
	s.CovarianceInto(v[:])
	for _, x := range v[:k*k] {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x))
	}
	return b
}

func getState(b []byte, s *estimator.State) []byte {
	w := binary.LittleEndian.Uint64(b)
	k, angles := int(uint32(w)), uint16(w>>32)
	b = b[8:]
	var x [estimator.MaxStates]float64
	var p [estimator.MaxStates * estimator.MaxStates]float64
	for i := range x[:k] {
		x[i] = math.Float64frombits(binary.LittleEndian.Uint64(b))
		b = b[8:]
	}
	for i := range p[:k*k] {
		p[i] = math.Float64frombits(binary.LittleEndian.Uint64(b))
		b = b[8:]
	}
	*s = estimator.NewState(k, angles, x[:k], p[:k*k])
	return b
}

// fileStore is a file of fixed-size records with a read cache of one chunk.
type fileStore struct {
	f      *os.File
	w      *bufio.Writer
	size   int
	n      int
	cache  []byte
	cacheN int // first record in cache
	cacheC int // records in cache
}

func newFileStore(dir, pattern string, size int) (*fileStore, error) {
	f, err := os.CreateTemp(dir, pattern)
	if err != nil {
		return nil, err
	}
	// Unlinked at once: the space goes back when the file is closed, even
	// if the review is interrupted.
	os.Remove(f.Name())
	return &fileStore{f: f, w: bufio.NewWriterSize(f, 1<<20), size: size, cacheN: -1}, nil
}

func (fs *fileStore) appendRec(b []byte) error {
	if len(b) != fs.size {
		panic(fmt.Sprintf("review: record of %d bytes in a store of %d", len(b), fs.size))
	}
	fs.n++
	_, err := fs.w.Write(b)
	return err
}

// record returns record i, reading the chunk that ends at it (the smoother
// and the report read backwards and forwards in order).
func (fs *fileStore) record(i int, backwards bool) ([]byte, error) {
	if fs.w != nil && fs.w.Buffered() > 0 {
		if err := fs.w.Flush(); err != nil {
			return nil, err
		}
	}
	if i < fs.cacheN || i >= fs.cacheN+fs.cacheC || fs.cacheN < 0 {
		first := i
		if backwards {
			first = max(0, i-chunk+1)
		}
		count := min(chunk, fs.n-first)
		if cap(fs.cache) < count*fs.size {
			fs.cache = make([]byte, chunk*fs.size)
		}
		fs.cache = fs.cache[:count*fs.size]
		if _, err := fs.f.ReadAt(fs.cache, int64(first)*int64(fs.size)); err != nil {
			return nil, err
		}
		fs.cacheN, fs.cacheC = first, count
	}
	off := (i - fs.cacheN) * fs.size
	return fs.cache[off : off+fs.size], nil
}

func (fs *fileStore) close() error { return fs.f.Close() }

// stepFile is a fusion.StepStore on disk.
type stepFile struct {
	*fileStore
	k   int // state size
	buf []byte
}

func newStepFile(dir string, k int) (*stepFile, error) {
	fs, err := newFileStore(dir, "reckon-steps-*", stepBytes(k))
	return &stepFile{fileStore: fs, k: k}, err
}

func (sf *stepFile) add(s *fusion.Step) error {
	b := sf.buf[:0]
	b = binary.LittleEndian.AppendUint64(b, uint64(s.StampNs))
	b = putState(b, &s.Pred)
	b = putState(b, &s.Post)
	for i := 0; i < sf.k; i++ {
		for _, v := range s.F[i*estimator.MaxStates : i*estimator.MaxStates+sf.k] {
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		}
	}
	start := uint64(0)
	if s.Start {
		start = 1
	}
	b = binary.LittleEndian.AppendUint64(b, start)
	sf.buf = b
	return sf.appendRec(b)
}

func (sf *stepFile) Len() int { return sf.n }

func (sf *stepFile) Step(i int, dst *fusion.Step) error { return sf.read(i, dst, true) }

func (sf *stepFile) read(i int, dst *fusion.Step, backwards bool) error {
	b, err := sf.record(i, backwards)
	if err != nil {
		return err
	}
	dst.StampNs = int64(binary.LittleEndian.Uint64(b))
	b = getState(b[8:], &dst.Pred)
	b = getState(b, &dst.Post)
	dst.F = [estimator.MaxStates * estimator.MaxStates]float64{}
	for i := 0; i < sf.k; i++ {
		for j := 0; j < sf.k; j++ {
			dst.F[i*estimator.MaxStates+j] = math.Float64frombits(binary.LittleEndian.Uint64(b))
			b = b[8:]
		}
	}
	dst.Start = binary.LittleEndian.Uint64(b) == 1
	return nil
}

// stateFile is a fusion.StateSink on disk. The smoother writes backwards,
// so writes gather in an aligned block of chunk records before they reach
// the file.
type stateFile struct {
	*fileStore
	k      int // state size
	blk    []byte
	blkNum int // block in blk, -1 for none
	lo, hi int // records [lo, hi) of the block are filled
}

func newStateFile(dir string, k int) (*stateFile, error) {
	fs, err := newFileStore(dir, "reckon-smoothed-*", stateBytes(k))
	return &stateFile{fileStore: fs, k: k, blk: make([]byte, chunk*stateBytes(k)), blkNum: -1}, err
}

// SetSmoothed stores state i.
func (sf *stateFile) SetSmoothed(i int, s *estimator.State) error {
	if b := i / chunk; b != sf.blkNum {
		if err := sf.flush(); err != nil {
			return err
		}
		sf.blkNum, sf.lo, sf.hi = b, i, i+1
	}
	sf.lo, sf.hi = min(sf.lo, i), max(sf.hi, i+1)
	off := (i % chunk) * stateBytes(sf.k)
	putState(sf.blk[off:off], s)
	return nil
}

func (sf *stateFile) flush() error {
	if sf.blkNum < 0 {
		return nil
	}
	base := sf.blkNum * chunk
	sb := stateBytes(sf.k)
	_, err := sf.f.WriteAt(sf.blk[(sf.lo-base)*sb:(sf.hi-base)*sb], int64(sf.lo)*int64(sb))
	sf.n = max(sf.n, sf.hi)
	sf.blkNum = -1
	return err
}

func (sf *stateFile) get(i int, s *estimator.State) error {
	if err := sf.flush(); err != nil {
		return err
	}
	b, err := sf.record(i, false)
	if err != nil {
		return err
	}
	getState(b, s)
	return nil
}

// stepStore keeps steps in memory up to a budget and spills them to a file
// past it, so that a long run's memory is bounded.
type stepStore struct {
	dir    string
	budget int             // steps kept in memory at most
	mem    [][]fusion.Step // chunks of chunk steps: no large copies as it grows
	n      int
	file   *stepFile
}

// Bytes a step costs in memory, with its smoothed state.
var stepMemBytes = int64(reflect.TypeFor[fusion.Step]().Size() + reflect.TypeFor[estimator.State]().Size())

func newStepStore(dir string, memoryBytes int64) *stepStore {
	return &stepStore{dir: dir, budget: int(memoryBytes / stepMemBytes)}
}

func (ss *stepStore) add(s *fusion.Step) error {
	if ss.file == nil {
		if ss.n < ss.budget {
			if ss.n%chunk == 0 {
				ss.mem = append(ss.mem, make([]fusion.Step, 0, chunk))
			}
			last := &ss.mem[len(ss.mem)-1]
			*last = append(*last, *s)
			ss.n++
			return nil
		}
		f, err := newStepFile(ss.dir, s.Pred.Size())
		if err != nil {
			return err
		}
		for _, c := range ss.mem {
			for i := range c {
				if err := f.add(&c[i]); err != nil {
					return err
				}
			}
		}
		ss.mem, ss.file = nil, f
	}
	return ss.file.add(s)
}

func (ss *stepStore) Len() int {
	if ss.file != nil {
		return ss.file.Len()
	}
	return ss.n
}

func (ss *stepStore) Step(i int, dst *fusion.Step) error { return ss.read(i, dst, true) }

func (ss *stepStore) read(i int, dst *fusion.Step, backwards bool) error {
	if ss.file != nil {
		return ss.file.read(i, dst, backwards)
	}
	*dst = ss.mem[i/chunk][i%chunk]
	return nil
}

func (ss *stepStore) onDisk() bool { return ss.file != nil }

// flush writes the steps buffered for the file.
func (ss *stepStore) flush() error {
	if ss.file != nil {
		return ss.file.w.Flush()
	}
	return nil
}

// reader returns a reader of the steps with a cache of its own, which may
// read while the store is read elsewhere (once every step was added and
// flushed). It shares the store's file: close only the store.
func (ss *stepStore) reader() (*stepStore, error) {
	if ss.file == nil {
		return ss, nil // reading memory changes nothing
	}
	if err := ss.flush(); err != nil {
		return nil, err
	}
	fs := &fileStore{f: ss.file.f, size: ss.file.size, n: ss.file.n, cacheN: -1}
	return &stepStore{file: &stepFile{fileStore: fs, k: ss.file.k}}, nil
}

func (ss *stepStore) close() error {
	if ss.file != nil {
		return ss.file.close()
	}
	return nil
}

// stateStore is a StateSink in memory, or on disk beside a spilled step
// store.
type stateStore struct {
	mem  []estimator.State
	file *stateFile
}

func newStateStore(dir string, n, k int, onDisk bool) (*stateStore, error) {
	if !onDisk {
		return &stateStore{mem: make([]estimator.State, n)}, nil
	}
	f, err := newStateFile(dir, k)
	return &stateStore{file: f}, err
}

func (ss *stateStore) SetSmoothed(i int, s *estimator.State) error {
	if ss.file != nil {
		return ss.file.SetSmoothed(i, s)
	}
	ss.mem[i] = *s
	return nil
}

func (ss *stateStore) flush() error {
	if ss.file != nil {
		return ss.file.flush()
	}
	return nil
}

func (ss *stateStore) get(i int, s *estimator.State) error {
	if ss.file != nil {
		return ss.file.get(i, s)
	}
	*s = ss.mem[i]
	return nil
}

func (ss *stateStore) close() error {
	if ss.file != nil {
		return ss.file.close()
	}
	return nil
}
