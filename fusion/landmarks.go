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

// LandmarkSurveyVar returns the variance of landmark l's survey error in
// each axis (m^2): its own position_std_m squared, or the configuration's
// landmark_position_std_m squared.
func (c *Config) LandmarkSurveyVar(l *Landmark) float64 { return c.landmarkVar(l) }

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

// LandmarkOffset is what a run learnt of one mapped landmark's survey
// error while a landmark block stood for it: the estimated offset of its
// true position from the mapped one (metres, field frame) with its
// covariance, from the block's prior (PriorVarM2 in each axis) and that
// visit's fixes. A landmark seen on several visits has one per visit;
// CombineOffsets joins them.
type LandmarkOffset struct {
	ID string
	// UntilNs is the stamp up to which the visit's fixes count: where the
	// block went to another landmark, or the run's end.
	UntilNs    int64
	DXM, DYM   float64
	Cov        [4]float64
	PriorVarM2 float64
}

// Mahalanobis returns the squared Mahalanobis length of the offset less
// (dx, dy) under its covariance (from its own origin: 0, 0); false if the
// covariance is not positive definite.
func (o *LandmarkOffset) Mahalanobis(dx, dy float64) (float64, bool) {
	d := [3]float64{o.DXM - dx, o.DYM - dy}
	c := [9]float64{o.Cov[0], o.Cov[1], 0, o.Cov[2], o.Cov[3], 0, 0, 0, 1}
	return estimator.Mahalanobis(&d, &c)
}

// CollectLandmarkOffsets makes the robot keep, as each becomes final,
// what its landmark blocks learnt of each landmark (a map check: a marker
// far off its mapped position shows as an offset many standard errors
// long). Without landmark blocks there is nothing to keep.
func (r *Robot) CollectLandmarkOffsets() {
	if r.offsets == nil {
		r.offsets = &offsetCollector{}
	}
}

// FinishLandmarkOffsets makes every input of the run final and returns
// the offsets not yet taken, the visits still open at the run's end
// included (as FinishSteps: the robot takes no late samples older than its
// newest odometry afterwards).
func (r *Robot) FinishLandmarkOffsets() []LandmarkOffset {
	if r.offsets == nil {
		return nil
	}
	if n := len(r.live()); n > 0 {
		r.dropFront(n)
	}
	st := r.f.State()
	for b := range r.lmAt {
		r.offsets.visit(r, &st, &r.lm, b, r.newest)
	}
	out := r.offsets.ready
	r.offsets.ready = nil
	return out
}

// offsetCollector keeps the landmark offsets of visits that ended.
type offsetCollector struct {
	ready []LandmarkOffset
}

// collect takes the visits that the seeding entries among the first k
// live entries ended: the block's landmark and estimate just before each.
func (c *offsetCollector) collect(r *Robot, k int) {
	for i := range r.live()[:k] {
		e := &r.live()[i]
		if !e.seeded {
			continue
		}
		cp := r.before(i)
		for b, at := range r.lmAt {
			if at == e.meas.LandmarkError {
				c.visit(r, &cp.est, &cp.lm, b, e.t1)
			}
		}
	}
}

// visit adds block b's estimate in st as a visit of the landmark table t
// gives it, ending at until; nothing for an empty block.
func (c *offsetCollector) visit(r *Robot, st *estimator.State, t *lmTable, b int, until int64) {
	id := t[b].id
	if id == 0 {
		return
	}
	at := r.lmAt[b]
	c.ready = append(c.ready, LandmarkOffset{ID: r.cfg.Landmarks[id-1].ID, UntilNs: until,
		DXM: st.MeanAt(at), DYM: st.MeanAt(at + 1),
		Cov:        [4]float64{st.At(at, at), st.At(at, at+1), st.At(at+1, at), st.At(at+1, at+1)},
		PriorVarM2: r.lmVar[id-1]})
}

// CombineOffsets joins the visits of each landmark into one estimate, in
// the order of first visit: each visit's posterior is its prior times the
// likelihood of its fixes, so the likelihoods are the posteriors'
// information less the prior's, and their sum with one prior is the
// estimate from every visit (information form; the visits' fixes taken as
// independent given the offset, which the pose errors they share make a
// little optimistic).
func CombineOffsets(visits []LandmarkOffset) []LandmarkOffset {
	type acc struct {
		info [4]float64 // information, 2x2
		vec  [2]float64 // information times mean
		out  LandmarkOffset
	}
	var order []string
	by := map[string]*acc{}
	for _, v := range visits {
		a, ok := by[v.ID]
		if !ok {
			p := 1 / v.PriorVarM2
			a = &acc{info: [4]float64{p, 0, 0, p}, out: LandmarkOffset{ID: v.ID, PriorVarM2: v.PriorVarM2}}
			by[v.ID] = a
			order = append(order, v.ID)
		}
		inv, ok := inverse2(v.Cov)
		if !ok {
			continue
		}
		p := 1 / v.PriorVarM2
		a.info[0] += inv[0] - p
		a.info[1] += inv[1]
		a.info[2] += inv[2]
		a.info[3] += inv[3] - p
		a.vec[0] += inv[0]*v.DXM + inv[1]*v.DYM
		a.vec[1] += inv[2]*v.DXM + inv[3]*v.DYM
		a.out.UntilNs = max(a.out.UntilNs, v.UntilNs)
	}
	out := make([]LandmarkOffset, 0, len(order))
	for _, id := range order {
		a := by[id]
		cov, ok := inverse2(a.info)
		if !ok {
			continue
		}
		a.out.Cov = cov
		a.out.DXM = cov[0]*a.vec[0] + cov[1]*a.vec[1]
		a.out.DYM = cov[2]*a.vec[0] + cov[3]*a.vec[1]
		out = append(out, a.out)
	}
	return out
}

// inverse2 inverts the symmetric 2x2 matrix m; false unless it is
// positive definite.
func inverse2(m [4]float64) ([4]float64, bool) {
	s := (m[1] + m[2]) / 2
	det := m[0]*m[3] - s*s
	if !(m[0] > 0 && det > 0) {
		return [4]float64{}, false
	}
	return [4]float64{m[3] / det, -s / det, -s / det, m[0] / det}, true
}
