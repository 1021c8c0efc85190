package review

import (
	"context"
	"fmt"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// batchPool hands out at most max slices of capacity size, made as they
// are first needed, to one goroutine (get) and takes them back from any
// (put). When all are out, get waits for one: the goroutines that pass
// batches back and forth reuse a fixed few instead of making a new one
// (a megabyte, cleared) whenever the other side is behind.
type batchPool[T any] struct {
	free            chan []T
	made, max, size int
}

func newBatchPool[T any](max, size int) *batchPool[T] {
	return &batchPool[T]{free: make(chan []T, max), max: max, size: size}
}

// get returns an empty slice, or nil and false if stop is closed first.
func (bp *batchPool[T]) get(stop <-chan struct{}) ([]T, bool) {
	select {
	case b := <-bp.free:
		return b[:0], true
	default:
	}
	if bp.made < bp.max {
		bp.made++
		return make([]T, 0, bp.size), true
	}
	select {
	case b := <-bp.free:
		return b[:0], true
	case <-stop:
		return nil, false
	}
}

// put gives b back; it never waits.
func (bp *batchPool[T]) put(b []T) { bp.free <- b[:0] }

// prefetch reads a store's records in a goroutine of its own, in runs of
// prefetchLen, ahead of a reader that walks them in order (forwards, or
// last first): decoding the steps then takes the other core while the
// smoother or the report's pass works. Runs go back for reuse once read.
type prefetch[T any] struct {
	n, step int // records; +1 forwards, -1 backwards
	runs    chan prefetchRun[T]
	pool    *batchPool[T]
	stop    chan struct{}
	done    chan struct{} // closed when the reading goroutine has returned
	stopped bool
	cur     prefetchRun[T]
	have    bool
}

type prefetchRun[T any] struct {
	lo    int
	items []T
	err   error
}

const prefetchLen = 256

// startPrefetch reads records 0 to n-1 (n-1 to 0 with backwards) with
// fill, which sets dst[j] to record lo+j. Once ctx is done, the next run
// is its error instead.
func startPrefetch[T any](ctx context.Context, n int, backwards bool, fill func(lo int, dst []T) error) *prefetch[T] {
	// Four runs at most: two sent, one read, one being filled.
	p := &prefetch[T]{n: n, step: 1, runs: make(chan prefetchRun[T], 2), pool: newBatchPool[T](4, prefetchLen), stop: make(chan struct{}), done: make(chan struct{})}
	if backwards {
		p.step = -1
	}
	go func() {
		defer close(p.done)
		defer close(p.runs)
		for r := 0; r*prefetchLen < n; r++ {
			lo := r * prefetchLen
			if backwards {
				lo = max(0, n-(r+1)*prefetchLen)
			}
			hi := min(n, lo+prefetchLen)
			if backwards {
				hi = n - r*prefetchLen
			}
			items, ok := p.pool.get(p.stop)
			if !ok {
				return
			}
			err := ctx.Err()
			if err == nil {
				err = fill(lo, items[:hi-lo])
			}
			select {
			case p.runs <- prefetchRun[T]{lo, items[:hi-lo], err}:
			case <-p.stop:
				return
			}
			if err != nil {
				return
			}
		}
	}()
	return p
}

// at returns record i, which must follow the one asked for before in the
// prefetcher's order. The record is valid until the call after the next
// run is needed.
func (p *prefetch[T]) at(i int) (*T, error) {
	for !p.have || i < p.cur.lo || i >= p.cur.lo+len(p.cur.items) {
		if p.have {
			if (p.step > 0 && i < p.cur.lo) || (p.step < 0 && i >= p.cur.lo+len(p.cur.items)) {
				panic(fmt.Sprintf("review: record %d read out of order", i))
			}
			p.pool.put(p.cur.items)
		}
		r, ok := <-p.runs
		if !ok {
			return nil, fmt.Errorf("review: record %d of %d was not read", i, p.n)
		}
		if r.err != nil {
			return nil, r.err
		}
		p.cur, p.have = r, true
	}
	return &p.cur.items[i-p.cur.lo], nil
}

// close stops the reading goroutine and waits for it to return, so that
// what it reads may be closed then; it may be called again.
func (p *prefetch[T]) close() {
	if !p.stopped {
		p.stopped = true
		close(p.stop)
	}
	<-p.done
}

// prefetchedSteps is a fusion.GainedSteps for the smoother, which reads the
// steps last first, with the steps decoded and most of the smoother's
// gains worked out ahead, on the other core: the gains are half of the
// smoother's arithmetic and need neither smoothed estimate
// (prefetchGains).
type prefetchedSteps struct {
	n int
	p *prefetch[gainedStep]
	// every and posts: the filtered states at i%every == 0 and at n-1,
	// kept whole as the smoother reads them, for the figures.
	every int
	posts map[int]*estimator.State
}

// gainedStep is a step and, if gained, the smoother's transposed gain
// between it and the next step (estimator.RTSGain): for the steps
// prefetchGains picks, unless the next starts a segment or the step is the
// last.
type gainedStep struct {
	step    fusion.Step
	gain    [estimator.MaxStates * estimator.MaxStates]float64
	gained  bool
	gainErr error
}

// prefetchGains picks the steps whose gains the prefetcher works out:
// three in four. Besides the gains left to it (0.9 us each for four
// states), the smoother's goroutine copies each step, updates the state
// with the gain and stores the row (1 us a step), and the prefetcher
// decodes the step (0.4 us) besides its gains; in profiles of an hour, two
// in three and four in five left the two goroutines 0.9 and 0.7 s, and 0.6
// and 0.8 s.
func prefetchGains(k int) bool { return k%4 != 3 }

func prefetchSteps(ctx context.Context, steps *stepStore, every int) *prefetchedSteps {
	rd := steps.reader()
	n := steps.Len()
	// next holds step hi of the run being filled, [lo, hi): the lowest of
	// the run filled before.
	next := new(fusion.Step)
	// carry holds the gain the record of step lo held (between steps
	// lo-1 and lo), for the run filled next, if stored is set.
	var carry gainMatrix
	stored := false
	return &prefetchedSteps{n: n, every: every, posts: map[int]*estimator.State{}, p: startPrefetch(ctx, n, true, func(lo int, dst []gainedStep) error {
		// The gain between steps k and k+1 that the step writer stored
		// came with step k+1; it goes to the item of step k: from the run
		// filled before (carry) for the last item.
		last := &dst[len(dst)-1]
		last.gain, last.gained = carry, stored
		for j := range dst {
			g := &carry
			if j > 0 {
				g = &dst[j-1].gain
			}
			had, err := rd.stepGain(lo+j, &dst[j].step, g)
			if err != nil {
				return err
			}
			if j > 0 {
				dst[j-1].gained = had
			} else {
				stored = had
			}
		}
		for j := len(dst) - 1; j >= 0; j-- {
			k, g := lo+j, &dst[j]
			nx := next
			if j+1 < len(dst) {
				nx = &dst[j+1].step
			}
			g.gainErr = nil
			if k+1 >= n || nx.Start {
				g.gained = false // none asked for
				continue
			}
			if !g.gained && prefetchGains(k) {
				g.gained = true
				g.gainErr = estimator.RTSGain(&g.gain, &g.step.Post, &nx.Pred, &nx.F)
			}
		}
		if len(dst) > 0 {
			next.CopyFrom(&dst[0].step)
		}
		return nil
	})}
}

func (ps *prefetchedSteps) Len() int { return ps.n }

func (ps *prefetchedSteps) Step(i int, dst *fusion.Step) error {
	g, err := ps.p.at(i)
	if err == nil {
		s := &g.step
		dst.CopyFrom(s)
		if i%ps.every == 0 || i == ps.n-1 {
			c := new(estimator.State)
			copyState(c, &s.Post)
			ps.posts[i] = c
		}
	}
	return err
}

// Gain returns the gain between steps k and k+1, once step k was read, or
// nil for the smoother to work out.
func (ps *prefetchedSteps) Gain(k int) (*[estimator.MaxStates * estimator.MaxStates]float64, error) {
	g, err := ps.p.at(k)
	if err != nil || !g.gained {
		return nil, err
	}
	return &g.gain, g.gainErr
}

// trackItem is what the walk of the smoothed track needs of a step: its
// stamp, the export row of its smoothed state and, with a truth file, the
// truth at its stamp and the pose NEES of the smoothed state against it.
type trackItem struct {
	stampNs   int64
	smoothed  trackRow
	smoothCov [9]float64
	truth     estimator.Pose
	haveTruth bool
	nees      float64
}

// prefetchTrack reads the smoothed states forwards, with the stamps the
// filtered walk kept and the truth (if not nil), ahead of the walk of the
// smoothed track.
func prefetchTrack(ctx context.Context, sm *smoothedRows, fw *filteredWalk, truth truthSource) *prefetch[trackItem] {
	return startPrefetch(ctx, fw.n, false, func(lo int, dst []trackItem) error {
		for j := range dst {
			it := &dst[j]
			i := lo + j
			it.stampNs = fw.stamp(i)
			if err := sm.row(i, &it.smoothed, &it.smoothCov); err != nil {
				return err
			}
			it.haveTruth = false
			if truth != nil {
				var err error
				if it.truth, it.haveTruth, err = truth.truthAt(i, it.stampNs); err != nil {
					return err
				}
			}
			if it.haveTruth {
				sp := estimator.Pose{X: it.smoothed.v[0], Y: it.smoothed.v[1], Heading: it.smoothed.v[2]}
				it.nees = neesOf(sp, &it.smoothCov, it.truth)
			}
		}
		return nil
	})
}
