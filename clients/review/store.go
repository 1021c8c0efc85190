package review

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"math"
	"math/bits"
	"os"
	"reflect"
	"runtime/debug"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// A long run's steps and smoothed states are kept on disk, so that memory
// does not grow with the run, in compact little-endian records that come
// back bit for bit:
//
//   - a state is its size n (one byte), a form byte (1: the covariance is
//     symmetric to the bit and only its upper triangle is stored), the
//     angle set (two bytes), the mean (n) and the covariance (n(n+1)/2 or
//     n x n);
//   - a step is its stamp, a flags byte (1: Start; 2: Post is Pred to the
//     bit and is not stored; 4: the gain follows), Pred, Post, the
//     transition Jacobian F (k x k, k the store's state size) as a bit mask
//     of the entries that differ from the identity followed by those
//     entries and, with flag 4, the smoother's transposed gain between the
//     step before and this one (estimator.RTSGain; k x k), worked out by
//     the step writer where it had time to spare.
//
// The filter keeps its covariances symmetric to the bit, and most entries
// of F are those of the identity, so that a step of four states takes
// about 200 bytes instead of the 480 of the full form: the review writes
// and reads less. Records are read in chunks of chunk records, found by
// the offset of each chunk.
const chunk = 2048 // records read at once

const (
	stateTri  = 1 // a state's covariance stored as its upper triangle
	stepStart = 1 // Step.Start
	stepSame  = 2 // Post equals Pred and is not stored
	stepGain  = 4 // the gain with the step before follows
)

// gainMatrix is a transposed smoother gain (estimator.RTSGain).
type gainMatrix = [estimator.MaxStates * estimator.MaxStates]float64

// symmetric reports whether s's covariance is symmetric to the bit.
func symmetric(s *estimator.State) bool {
	k := s.Size()
	for i := 0; i < k; i++ {
		for j := i + 1; j < k; j++ {
			if math.Float64bits(s.At(i, j)) != math.Float64bits(s.At(j, i)) {
				return false
			}
		}
	}
	return true
}

func appendF64(b []byte, v float64) []byte {
	return binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
}

func putState(b []byte, s *estimator.State) []byte {
	k := s.Size()
	form := byte(0)
	tri := symmetric(s)
	if tri {
		form = stateTri
	}
	b = append(b, byte(k), form)
	b = binary.LittleEndian.AppendUint16(b, s.Angles())
	for i := 0; i < k; i++ {
		b = appendF64(b, s.MeanAt(i))
	}
	for i := 0; i < k; i++ {
		j0 := 0
		if tri {
			j0 = i
		}
		for j := j0; j < k; j++ {
			b = appendF64(b, s.At(i, j))
		}
	}
	return b
}

// stateLen returns the length of the state record at the start of b.
func stateLen(b []byte) int {
	k := int(b[0])
	if b[1]&stateTri != 0 {
		return 4 + (k+k*(k+1)/2)*8
	}
	return 4 + (k+k*k)*8
}

// getState decodes the state record at the start of b into s and returns
// the rest of b.
func getState(b []byte, s *estimator.State) []byte {
	k, tri := int(b[0]), b[1]&stateTri != 0
	angles := binary.LittleEndian.Uint16(b[2:])
	b = b[4:]
	if k == 0 {
		*s = estimator.State{}
		return b
	}
	// The packed form of estimator.Filter.Pack: the mean, then the
	// covariance row by row.
	var v [estimator.MaxStates * (estimator.MaxStates + 1)]float64
	for i := range v[:k] {
		v[i] = math.Float64frombits(binary.LittleEndian.Uint64(b))
		b = b[8:]
	}
	p := v[k:]
	for i := 0; i < k; i++ {
		j0 := 0
		if tri {
			j0 = i
		}
		for j := j0; j < k; j++ {
			p[i*k+j] = math.Float64frombits(binary.LittleEndian.Uint64(b))
			b = b[8:]
		}
		if tri {
			for j := 0; j < i; j++ {
				p[i*k+j] = p[j*k+i]
			}
		}
	}
	s.SetPacked(k, angles, v[:k+k*k])
	return b
}

// fMaskBytes is the length of the mask of a Jacobian of size k.
func fMaskBytes(k int) int { return (k*k + 7) / 8 }

// identityBits returns the bits of entry (i, j) of the identity.
func identityBits(i, j int) uint64 {
	if i == j {
		return math.Float64bits(1)
	}
	return 0
}

// stepLen returns the length of the step record of state size k at the
// start of b.
func stepLen(b []byte, k int) int {
	n := 9
	n += stateLen(b[n:])
	if b[8]&stepSame == 0 {
		n += stateLen(b[n:])
	}
	m := fMaskBytes(k)
	set := 0
	for _, x := range b[n : n+m] {
		set += bits.OnesCount8(x)
	}
	if b[8]&stepGain != 0 {
		set += k * k
	}
	return n + m + set*8
}

// chunkedFile is a file of variable-length records read a chunk at a time,
// with a read cache of one chunk: the record offsets within it, and its
// bytes.
type chunkedFile struct {
	f *os.File
	n int // records
	// span returns where chunk c lies in the file; recLen the length of
	// the record at the start of a slice.
	span   func(c int) (off, length int64)
	recLen func(b []byte) int
	cache  []byte
	offs   []int
	cacheC int // chunk in cache, -1 for none
}

func createTemp(dir, pattern string) (*os.File, error) {
	f, err := os.CreateTemp(dir, pattern)
	if err != nil {
		return nil, err
	}
	// Unlinked at once: the space goes back when the file is closed, even
	// if the review is interrupted.
	os.Remove(f.Name())
	return f, nil
}

// record returns record i.
func (cf *chunkedFile) record(i int) ([]byte, error) {
	if c := i / chunk; c != cf.cacheC {
		off, length := cf.span(c)
		if cap(cf.cache) < int(length) {
			cf.cache = make([]byte, length)
		}
		cf.cache = cf.cache[:length]
		if _, err := cf.f.ReadAt(cf.cache, off); err != nil {
			return nil, err
		}
		cf.offs = cf.offs[:0]
		for at, count := 0, min(chunk, cf.n-c*chunk); len(cf.offs) < count; at += cf.recLen(cf.cache[at:]) {
			if at >= len(cf.cache) {
				return nil, fmt.Errorf("review: chunk %d of a store holds fewer records than it should", c)
			}
			cf.offs = append(cf.offs, at)
		}
		cf.cacheC = c
	}
	return cf.cache[cf.offs[i%chunk]:], nil
}

// stepFile is a fusion.StepStore on disk.
type stepFile struct {
	f      *os.File
	w      *bufio.Writer
	k      int     // state size
	n      int     // steps
	size   int64   // bytes written
	starts []int64 // offset of each chunk
	buf    []byte
}

func newStepFile(dir string, k int) (*stepFile, error) {
	f, err := createTemp(dir, "reckon-steps-*")
	if err != nil {
		return nil, err
	}
	return &stepFile{f: f, w: bufio.NewWriterSize(f, 1<<20), k: k}, nil
}

// add appends s and, if gain is not nil, the transposed gain between the
// step added before and s (k x k, stride estimator.MaxStates).
func (sf *stepFile) add(s *fusion.Step, gain *gainMatrix) error {
	if s.Pred.Size() > estimator.MaxStates || s.Post.Size() > estimator.MaxStates {
		panic(fmt.Sprintf("review: step of sizes %d and %d", s.Pred.Size(), s.Post.Size()))
	}
	b := binary.LittleEndian.AppendUint64(sf.buf[:0], uint64(s.StampNs))
	flags := byte(0)
	if s.Start {
		flags |= stepStart
	}
	if sameBits(&s.Post, &s.Pred) {
		flags |= stepSame
	}
	if gain != nil && s.Pred.Size() != sf.k {
		gain = nil // not of the store's size: the smoother works it out
	}
	if gain != nil {
		flags |= stepGain
	}
	b = append(b, flags)
	b = putState(b, &s.Pred)
	if flags&stepSame == 0 {
		b = putState(b, &s.Post)
	}
	m := len(b)
	b = append(b, make([]byte, fMaskBytes(sf.k))...)
	for i := 0; i < sf.k; i++ {
		for j := 0; j < sf.k; j++ {
			if v := s.F[i*estimator.MaxStates+j]; math.Float64bits(v) != identityBits(i, j) {
				b[m+(i*sf.k+j)/8] |= 1 << ((i*sf.k + j) % 8)
				b = appendF64(b, v)
			}
		}
	}
	if gain != nil {
		for i := 0; i < sf.k; i++ {
			for _, v := range gain[i*estimator.MaxStates : i*estimator.MaxStates+sf.k] {
				b = appendF64(b, v)
			}
		}
	}
	sf.buf = b
	if sf.n%chunk == 0 {
		sf.starts = append(sf.starts, sf.size)
	}
	sf.n++
	sf.size += int64(len(b))
	_, err := sf.w.Write(b)
	return err
}

// sameBits reports whether a and b are the same state to the bit (== on
// floats takes -0 for 0 and never matches a NaN).
func sameBits(a, b *estimator.State) bool {
	k := a.Size()
	if b.Size() != k || a.Angles() != b.Angles() {
		return false
	}
	for i := 0; i < k; i++ {
		if math.Float64bits(a.MeanAt(i)) != math.Float64bits(b.MeanAt(i)) {
			return false
		}
		for j := 0; j < k; j++ {
			if math.Float64bits(a.At(i, j)) != math.Float64bits(b.At(i, j)) {
				return false
			}
		}
	}
	return true
}

// reader returns a reader of the steps, with a cache of its own (once
// every step was added and flushed).
func (sf *stepFile) reader() *stepReader {
	return &stepReader{k: sf.k, chunkedFile: chunkedFile{f: sf.f, n: sf.n, cacheC: -1,
		span: func(c int) (int64, int64) {
			end := sf.size
			if c+1 < len(sf.starts) {
				end = sf.starts[c+1]
			}
			return sf.starts[c], end - sf.starts[c]
		},
		recLen: func(b []byte) int { return stepLen(b, sf.k) }}}
}

// stepReader reads a step file.
type stepReader struct {
	chunkedFile
	k int
}

// readPost decodes the stamp, Start and Post of step i (into post).
func (sr *stepReader) readPost(i int, post *estimator.State) (stampNs int64, start bool, err error) {
	b, err := sr.record(i)
	if err != nil {
		return 0, false, err
	}
	stampNs, flags := int64(binary.LittleEndian.Uint64(b)), b[8]
	b = b[9:]
	if flags&stepSame == 0 {
		b = b[stateLen(b):]
	}
	getState(b, post)
	return stampNs, flags&stepStart != 0, nil
}

// read decodes step i into dst and, if the record holds it, the gain
// between step i-1 and step i into gain (its k x k block; not if gain is
// nil), and reports whether it holds one.
func (sr *stepReader) read(i int, dst *fusion.Step, gain *gainMatrix) (bool, error) {
	b, err := sr.record(i)
	if err != nil {
		return false, err
	}
	// A step of this size in dst already has zeros past the k x k block
	// of F, which then is all that is written (a Step of 12 states is 3.7
	// kB, of which a robot of 4 states uses 0.4).
	sameSize := dst.Pred.Size() == sr.k && dst.Post.Size() == sr.k
	dst.StampNs = int64(binary.LittleEndian.Uint64(b))
	flags := b[8]
	dst.Start = flags&stepStart != 0
	b = b[9:]
	b = getState(b, &dst.Pred)
	if flags&stepSame != 0 {
		copyState(&dst.Post, &dst.Pred)
	} else {
		b = getState(b, &dst.Post)
	}
	mask := b[:fMaskBytes(sr.k)]
	b = b[len(mask):]
	if !sameSize {
		dst.F = [estimator.MaxStates * estimator.MaxStates]float64{}
	}
	for i := 0; i < sr.k; i++ {
		for j := 0; j < sr.k; j++ {
			v := math.Float64frombits(identityBits(i, j))
			if mask[(i*sr.k+j)/8]&(1<<((i*sr.k+j)%8)) != 0 {
				v = math.Float64frombits(binary.LittleEndian.Uint64(b))
				b = b[8:]
			}
			dst.F[i*estimator.MaxStates+j] = v
		}
	}
	if flags&stepGain == 0 || gain == nil {
		return flags&stepGain != 0, nil
	}
	for i := 0; i < sr.k; i++ {
		row := gain[i*estimator.MaxStates : i*estimator.MaxStates+sr.k]
		for j := range row {
			row[j] = math.Float64frombits(binary.LittleEndian.Uint64(b))
			b = b[8:]
		}
	}
	return true, nil
}

// stateFile is a fusion.StateSink on disk. The smoother writes backwards,
// so a chunk's states gather in memory; when the chunk is done a goroutine
// of its own encodes and writes it while the smoother goes on, and the
// file holds the chunks last first.
type stateFile struct {
	f      *os.File
	k      int
	n      int
	blk    []estimator.State // the chunk being filled
	blkNum int               // chunk in blk, -1 for none
	lo, hi int               // records [lo, hi) of the chunk are filled
	jobs   chan stateChunk
	free   chan []estimator.State
	done   chan error
	closed bool
	err    error
	// size and spans (where each chunk lies) belong to the writing
	// goroutine until done.
	size  int64
	spans map[int][2]int64
}

// stateChunk is a chunk of states handed to the writer: states [lo, hi)
// of chunk num, in states[lo-num*chunk:].
type stateChunk struct {
	num, lo, hi int
	states      []estimator.State
}

func newStateFile(dir string, k int) (*stateFile, error) {
	f, err := createTemp(dir, "reckon-smoothed-*")
	if err != nil {
		return nil, err
	}
	sf := &stateFile{f: f, k: k, blk: make([]estimator.State, chunk), blkNum: -1, spans: map[int][2]int64{},
		jobs: make(chan stateChunk, 1), free: make(chan []estimator.State, 2), done: make(chan error, 1)}
	go sf.write()
	return sf, nil
}

// write encodes and writes the chunks handed over, until the jobs end.
func (sf *stateFile) write() {
	var err error
	var out []byte
	for c := range sf.jobs {
		if err == nil {
			out = out[:0]
			base := c.num * chunk
			for i := c.lo; i < c.hi; i++ {
				out = putState(out, &c.states[i-base])
			}
			_, err = sf.f.WriteAt(out, sf.size)
			sf.spans[c.num] = [2]int64{sf.size, int64(len(out))}
			sf.size += int64(len(out))
		}
		select {
		case sf.free <- c.states:
		default:
		}
	}
	sf.done <- err
}

// SetSmoothed stores state i.
func (sf *stateFile) SetSmoothed(i int, s *estimator.State) error {
	if s.Size() > sf.k {
		panic(fmt.Sprintf("review: smoothed state of size %d in a store of %d", s.Size(), sf.k))
	}
	if b := i / chunk; b != sf.blkNum {
		sf.hand()
		sf.blkNum, sf.lo, sf.hi = b, i, i+1
	}
	sf.lo, sf.hi = min(sf.lo, i), max(sf.hi, i+1)
	copyState(&sf.blk[i%chunk], s)
	return nil
}

// hand gives the chunk being filled to the writer.
func (sf *stateFile) hand() {
	if sf.blkNum < 0 {
		return
	}
	sf.jobs <- stateChunk{sf.blkNum, sf.lo, sf.hi, sf.blk}
	sf.n = max(sf.n, sf.hi)
	sf.blkNum = -1
	select {
	case sf.blk = <-sf.free:
	default:
		sf.blk = make([]estimator.State, chunk)
	}
}

// flush writes what is left and waits for the writer: the file is complete
// then. It may be called again.
func (sf *stateFile) flush() error {
	if !sf.closed {
		sf.hand()
		sf.closed = true
		close(sf.jobs)
		sf.err = <-sf.done
	}
	return sf.err
}

// reader returns a reader of the states (once flushed).
func (sf *stateFile) reader() *chunkedFile {
	return &chunkedFile{f: sf.f, n: sf.n, cacheC: -1,
		span:   func(c int) (int64, int64) { s := sf.spans[c]; return s[0], s[1] },
		recLen: stateLen}
}

// stepStore keeps steps in memory up to a budget and spills them to a file
// past it, so that a long run's memory is bounded.
type stepStore struct {
	dir    string
	budget int             // steps kept in memory at most
	mem    [][]fusion.Step // chunks of chunk steps: no large copies as it grows
	n      int
	file   *stepFile
	rd     *stepReader
	closed bool
}

// Bytes a step costs in memory, with its smoothed state.
var stepMemBytes = int64(reflect.TypeFor[fusion.Step]().Size() + reflect.TypeFor[estimator.State]().Size())

func newStepStore(dir string, memoryBytes int64) *stepStore {
	return &stepStore{dir: dir, budget: int(memoryBytes / stepMemBytes)}
}

// add appends s and, if gain is not nil, the transposed gain between the
// step added before and s, which is kept if the steps are on disk.
func (ss *stepStore) add(s *fusion.Step, gain *gainMatrix) error {
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
				if err := f.add(&c[i], nil); err != nil {
					return err
				}
			}
		}
		ss.mem, ss.file = nil, f
	}
	return ss.file.add(s, gain)
}

func (ss *stepStore) Len() int {
	if ss.file != nil {
		return ss.file.n
	}
	return ss.n
}

// Step copies step i into dst.
func (ss *stepStore) Step(i int, dst *fusion.Step) error {
	_, err := ss.stepGain(i, dst, nil)
	return err
}

// stepGain copies step i into dst and, if the store kept it, the gain
// between step i-1 and step i into gain (not nil then), which it reports.
func (ss *stepStore) stepGain(i int, dst *fusion.Step, gain *gainMatrix) (bool, error) {
	if ss.file == nil {
		dst.CopyFrom(&ss.mem[i/chunk][i%chunk])
		return false, nil
	}
	return ss.fileReader().read(i, dst, gain)
}

// readPost copies the stamp, Start and Post of step i (into post).
func (ss *stepStore) readPost(i int, post *estimator.State) (stampNs int64, start bool, err error) {
	if ss.file == nil {
		s := &ss.mem[i/chunk][i%chunk]
		copyState(post, &s.Post)
		return s.StampNs, s.Start, nil
	}
	return ss.fileReader().readPost(i, post)
}

func (ss *stepStore) fileReader() *stepReader {
	if ss.rd == nil {
		ss.rd = ss.file.reader()
	}
	return ss.rd
}

// copyState copies src into dst, only the part in use when they have one
// size.
func copyState(dst, src *estimator.State) {
	if src.Size() == 0 {
		*dst = *src
		return
	}
	dst.CopyFrom(src)
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
func (ss *stepStore) reader() *stepStore {
	if ss.file == nil {
		return ss // reading memory changes nothing
	}
	return &stepStore{file: ss.file}
}

// close gives the steps back: their file, or their memory; it may be
// called again.
func (ss *stepStore) close() error {
	ss.mem = nil
	if ss.file != nil && !ss.closed {
		ss.closed = true
		return ss.file.f.Close()
	}
	return nil
}

// rowBytes is what a smoothed state costs in memory as the numbers of its
// export row (smoothedRows).
const rowBytes = 12 * 8

// smoothedRows is the smoother's StateSink. It keeps what the review uses
// of each smoothed state: the numbers of its export row (trackRow: 96
// bytes, where the state is 1.2 kB in memory and about 120 bytes on disk),
// the lower pose covariance entries of the few states whose covariance is
// not symmetric to the bit (the NEES reads them), and the whole state at
// the points drawn. The rows stay in memory up to a budget, which an hour
// at 200 Hz fits; past it the states go to a file (stateFile) and the rows
// are made from them as they are read.
type smoothedRows struct {
	n      int
	v      []float64 // 12 numbers a state (trackRow.v), in memory
	free   func()    // gives v back
	offset []uint64  // bit i: state i has the IMU offset (trackRow.offset)
	lower  map[int][3]float64
	file   *stateFile
	rd     *chunkedFile
	tmp    estimator.State
	// every and kept: the states at i%every == 0 and at n-1, kept whole;
	// filtered: the filtered states there.
	every    int
	kept     map[int]*estimator.State
	filtered map[int]*estimator.State
}

// newSmoothedRows returns a store for n states of at most k components,
// in memory if their rows take at most budget bytes; the states at every
// every-th step (and the last) are kept whole.
func newSmoothedRows(dir string, n, k, every int, budget int64) (*smoothedRows, error) {
	sr := &smoothedRows{n: n, every: every, kept: map[int]*estimator.State{}, lower: map[int][3]float64{}}
	// The heap the replay leaves (the journal's segment, the steps kept in
	// memory until they spilled) goes back to the system first, so that
	// the rows, or the smoother's work with the states on disk, come on
	// top of what is live, not of what the collector kept.
	debug.FreeOSMemory()
	if int64(n)*rowBytes <= budget {
		var err error
		sr.v, sr.free, err = allocRows(12 * n)
		sr.offset = make([]uint64, (n+63)/64)
		return sr, err
	}
	f, err := newStateFile(dir, k)
	sr.file = f
	return sr, err
}

func (sr *smoothedRows) onDisk() bool { return sr.file != nil }

// SetSmoothed stores state i.
func (sr *smoothedRows) SetSmoothed(i int, s *estimator.State) error {
	if i%sr.every == 0 || i == sr.n-1 {
		c := new(estimator.State)
		copyState(c, s)
		sr.kept[i] = c
	}
	if sr.file != nil {
		return sr.file.SetSmoothed(i, s)
	}
	r := rowOf(0, s)
	copy(sr.v[12*i:12*i+12], r.v[:])
	if r.offset {
		sr.offset[i/64] |= 1 << (i % 64)
	}
	if lo := [3]float64{s.At(1, 0), s.At(2, 0), s.At(2, 1)}; !sameFloatBits(lo, [3]float64{r.v[4], r.v[5], r.v[7]}) {
		sr.lower[i] = lo
	}
	return nil
}

// sameFloatBits reports whether a and b are equal to the bit.
func sameFloatBits(a, b [3]float64) bool {
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// flush completes the store once the smoother is done.
func (sr *smoothedRows) flush() error {
	if sr.file != nil {
		return sr.file.flush()
	}
	return nil
}

// row sets r (all but its stamp) to the export row of state i and cov to
// its pose covariance (row-major, as estimator.State.PoseCovarianceInto
// gives it). It reads states in any order from memory; from the file,
// from one goroutine at a time.
func (sr *smoothedRows) row(i int, r *trackRow, cov *[9]float64) error {
	if sr.file == nil {
		copy(r.v[:], sr.v[12*i:12*i+12])
		r.offset = sr.offset[i/64]&(1<<(i%64)) != 0
		lo, ok := sr.lower[i]
		if !ok {
			lo = [3]float64{r.v[4], r.v[5], r.v[7]}
		}
		*cov = [9]float64{r.v[3], r.v[4], r.v[5], lo[0], r.v[6], r.v[7], lo[1], lo[2], r.v[8]}
		return nil
	}
	if sr.rd == nil {
		if err := sr.file.flush(); err != nil {
			return err
		}
		sr.rd = sr.file.reader()
	}
	b, err := sr.rd.record(i)
	if err != nil {
		return err
	}
	getState(b, &sr.tmp)
	*r = rowOf(0, &sr.tmp)
	sr.tmp.PoseCovarianceInto(cov)
	return nil
}

// state returns state i whole, for i%every == 0 and i == n-1.
func (sr *smoothedRows) state(i int) *estimator.State { return sr.kept[i] }

func (sr *smoothedRows) close() error {
	if sr.free != nil {
		sr.free()
		sr.v, sr.free = nil, nil
	}
	if sr.file != nil {
		sr.file.flush()
		return sr.file.f.Close()
	}
	return nil
}
