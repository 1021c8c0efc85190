package fusion

import (
	"math"

	"reckon.example/estimator"
)

// maxLandmarkBlocks bounds the landmark blocks of the state: as many
// landmarks as one camera frame usually holds keep their survey error's
// correlation with the estimate at once (DEVELOPERS.md, "Design: Landmark
// survey error").
const maxLandmarkBlocks = 3

// maxLandmarkStdM bounds a landmark's survey error: a map off by more is
// no map.
const maxLandmarkStdM = 10.0

// landmarkRef is a mapped landmark as the robot uses it: its position,
// its place in the configuration (from 1) and its survey error's variance
// in each axis (m^2).
type landmarkRef struct {
	xy   [2]float64
	id   int32
	var2 float64
}

// lmTable says which landmark each landmark block of the state stands
// for (id, from 1; 0 for none) and the stamp of its last fix (last), by
// which the least recently used block goes to a new landmark. It is part
// of every checkpoint: a replay assigns the blocks as the first pass did.
type lmTable [maxLandmarkBlocks]struct {
	id   int32
	last int64
}

// lmWords is the number of float64 words a checkpoint's lmTable takes in
// the packed checkpoints (Robot.cps) of a robot with landmark blocks.
const lmWords = 2 * maxLandmarkBlocks

// landmarkVar returns the variance of landmark l's survey error in each
// axis (m^2).
func (c *Config) landmarkVar(l *Landmark) float64 {
	s := l.PositionStdM
	if s == 0 {
		s = c.LandmarkPositionStdM
	}
	return s * s
}

// landmarkVarMax returns the largest survey error variance of the
// landmarks (m^2), or 0 when no sensor takes landmark fixes.
func (c *Config) landmarkVarMax() float64 {
	lm := false
	for i := range c.Sensors {
		lm = lm || c.Sensors[i].Kind == FixLandmark
	}
	var v float64
	for i := range c.Landmarks {
		v = max(v, c.landmarkVar(&c.Landmarks[i]))
	}
	if !lm {
		return 0
	}
	return v
}

// landmarkBlocks returns the first state of each landmark block.
func landmarkBlocks(l *estimator.Layout) []int {
	var out []int
	for k := 0; k < l.Biases(); k++ {
		if l.IsLandmark(k) {
			at, _ := l.Bias(k)
			out = append(out, at)
		}
	}
	return out
}

// landmarkKeepNs is how long a landmark block keeps standing for its
// landmark after the landmark's newest fix: one that another landmark
// takes sooner would come back without the correlation it built up, and
// landmarks taking turns at too few blocks would each count as news every
// time.
const landmarkKeepNs = 3e8

// landmarkBlock gives the measurement m of entry e, a fix of landmark e.lm,
// the landmark block that stands for it: the block that does already, or
// else an empty one, or else the one whose landmark was fixed longest ago,
// more than landmarkKeepNs before e, seeded for it (e.seeded). Without
// such a block the fix carries its landmark's survey error as white noise
// of its own (estimator.Measurement.LandmarkVar). A landmark without
// survey error takes neither.
func (r *Robot) landmarkBlock(e *entry) error {
	e.meas.LandmarkError, e.meas.LandmarkVar, e.seeded = 0, 0, false
	if e.lm == 0 || len(r.lmAt) == 0 {
		return nil
	}
	v := r.lmVar[e.lm-1]
	if v == 0 {
		return nil
	}
	k := -1
	for i := range r.lmAt {
		if r.lm[i].id == e.lm {
			k = i
			break
		}
	}
	if k < 0 {
		for i := range r.lmAt {
			if r.lm[i].id == 0 {
				k = i
				break
			}
			if r.lm[i].last <= e.t1-landmarkKeepNs && (k < 0 || r.lm[i].last < r.lm[k].last) {
				k = i
			}
		}
		if k < 0 {
			e.meas.LandmarkVar = v
			return nil
		}
		c := [4]float64{v, 0, 0, v}
		r.f.StateInto(&r.lmUndo.est)
		r.lmUndo.k, r.lmUndo.was = k, r.lm[k]
		if err := r.f.SeedBlock(r.lmAt[k], &c); err != nil {
			return err
		}
		r.lm[k].id, r.lm[k].last, e.seeded = e.lm, math.MinInt64, true
	}
	r.lm[k].last = max(r.lm[k].last, e.t1)
	e.meas.LandmarkError = r.lmAt[k]
	return nil
}

// lmUndo keeps what landmarkBlock changed when it seeded a block: the
// estimate before and the block's table entry.
type lmUndo struct {
	est estimator.State
	k   int
	was struct {
		id   int32
		last int64
	}
}

// unseed takes back the seeding of entry e's block when its fix was gated
// or failed: an outlier of a new landmark does not take the block of one
// in view.
func (r *Robot) unseed(e *entry) {
	r.f.SetState(&r.lmUndo.est)
	r.lm[r.lmUndo.k] = r.lmUndo.was
	e.seeded = false
}

// packTable writes t into dst (lmWords values), bit for bit.
func packTable(dst []float64, t *lmTable) {
	for i := range t {
		dst[2*i] = math.Float64frombits(uint64(t[i].id))
		dst[2*i+1] = math.Float64frombits(uint64(t[i].last))
	}
}

// unpackTable reads a table packTable wrote.
func unpackTable(t *lmTable, src []float64) {
	for i := range t {
		t[i].id = int32(math.Float64bits(src[2*i]))
		t[i].last = int64(math.Float64bits(src[2*i+1]))
	}
}
