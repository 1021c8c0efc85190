package review

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"os"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// Fixed-size little-endian records keep a long run's steps and smoothed
// states on disk, so that memory does not grow with the run. A state's
// covariance is stored as its upper triangle: the estimator leaves every
// covariance exactly symmetric (it symmetrises after each prediction,
// update and smoothing step), so the lower one is a bit-for-bit copy. A
// step's Jacobian is the identity but for its pose block (fusion's step
// collector), so only that block is stored.
const (
	bodyBytes  = (4 + 10) * 8              // mean (4), upper triangle of the 4x4 covariance (10)
	stateBytes = 8 + bodyBytes             // size, body
	stepBytes  = 8 + 8 + 2*bodyBytes + 9*8 // stamp, sizes and start, prediction, posterior, pose block of F
	chunk      = 2048                      // records read at once
)

// errJacobian reports a step Jacobian that is not the identity outside its
// pose block, which the step file cannot hold.
var errJacobian = errors.New("review: a step's Jacobian differs from the identity outside its pose block")

func putState(b []byte, s *estimator.State) []byte {
	b = binary.LittleEndian.AppendUint64(b, uint64(s.Size()))
	return putBody(b, s)
}

func putBody(b []byte, s *estimator.State) []byte {
	for i := 0; i < 4; i++ {
		v := 0.0
		if i < s.Size() {
			v = s.MeanAt(i)
		}
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
	}
	for i := 0; i < 4; i++ {
		for j := i; j < 4; j++ {
			v := 0.0
			if i < s.Size() && j < s.Size() {
				v = s.At(i, j)
			}
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		}
	}
	return b
}

func getState(b []byte, s *estimator.State) []byte {
	return getBody(b[8:], int(binary.LittleEndian.Uint64(b)), s)
}

func getBody(b []byte, n int, s *estimator.State) []byte {
	var x [4]float64
	var p [16]float64
	for i := range x {
		x[i] = math.Float64frombits(binary.LittleEndian.Uint64(b))
		b = b[8:]
	}
	for i := 0; i < 4; i++ {
		for j := i; j < 4; j++ {
			v := math.Float64frombits(binary.LittleEndian.Uint64(b))
			b = b[8:]
			if i < n && j < n {
				p[i*n+j], p[j*n+i] = v, v
			}
		}
	}
	*s = estimator.NewState(n, x[:n], p[:n*n])
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
	buf []byte
}

func newStepFile(dir string) (*stepFile, error) {
	fs, err := newFileStore(dir, "reckon-steps-*", stepBytes)
	return &stepFile{fileStore: fs}, err
}

func (sf *stepFile) add(s *fusion.Step) error {
	for k, v := range s.F {
		if r, c := k/4, k%4; (r == 3 || c == 3) && v != identity(r, c) {
			return errJacobian
		}
	}
	b := sf.buf[:0]
	b = binary.LittleEndian.AppendUint64(b, uint64(s.StampNs))
	head := uint64(s.Pred.Size())<<8 | uint64(s.Post.Size())<<16
	if s.Start {
		head |= 1
	}
	b = binary.LittleEndian.AppendUint64(b, head)
	b = putBody(b, &s.Pred)
	b = putBody(b, &s.Post)
	for r := 0; r < 3; r++ {
		for c := 0; c < 3; c++ {
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(s.F[r*4+c]))
		}
	}
	sf.buf = b
	return sf.appendRec(b)
}

func identity(r, c int) float64 {
	if r == c {
		return 1
	}
	return 0
}

func (sf *stepFile) Len() int { return sf.n }

func (sf *stepFile) Step(i int, dst *fusion.Step) error { return sf.read(i, dst, true) }

func (sf *stepFile) read(i int, dst *fusion.Step, backwards bool) error {
	b, err := sf.record(i, backwards)
	if err != nil {
		return err
	}
	dst.StampNs = int64(binary.LittleEndian.Uint64(b))
	head := binary.LittleEndian.Uint64(b[8:])
	b = getBody(b[16:], int(head>>8&0xff), &dst.Pred)
	b = getBody(b, int(head>>16&0xff), &dst.Post)
	for k := range dst.F {
		dst.F[k] = identity(k/4, k%4)
	}
	for r := 0; r < 3; r++ {
		for c := 0; c < 3; c++ {
			dst.F[r*4+c] = math.Float64frombits(binary.LittleEndian.Uint64(b))
			b = b[8:]
		}
	}
	dst.Start = head&1 == 1
	return nil
}

// stateFile is a fusion.StateSink on disk. The smoother writes backwards,
// so writes gather in an aligned block of chunk records before they reach
// the file.
type stateFile struct {
	*fileStore
	blk    []byte
	blkNum int // block in blk, -1 for none
	lo, hi int // records [lo, hi) of the block are filled
}

func newStateFile(dir string) (*stateFile, error) {
	fs, err := newFileStore(dir, "reckon-smoothed-*", stateBytes)
	return &stateFile{fileStore: fs, blk: make([]byte, chunk*stateBytes), blkNum: -1}, err
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
	off := (i % chunk) * stateBytes
	putState(sf.blk[off:off], s)
	return nil
}

func (sf *stateFile) flush() error {
	if sf.blkNum < 0 {
		return nil
	}
	base := sf.blkNum * chunk
	_, err := sf.f.WriteAt(sf.blk[(sf.lo-base)*stateBytes:(sf.hi-base)*stateBytes], int64(sf.lo)*stateBytes)
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
const stepMemBytes = 480 + 168

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
		f, err := newStepFile(ss.dir)
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
	return &stepStore{file: &stepFile{fileStore: fs}}, nil
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

func newStateStore(dir string, n int, onDisk bool) (*stateStore, error) {
	if !onDisk {
		return &stateStore{mem: make([]estimator.State, n)}, nil
	}
	f, err := newStateFile(dir)
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
