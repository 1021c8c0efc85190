package calib

import (
	"math"
	"slices"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// chunkNs is the length of the intervals whose wheel travels and IMU turn
// the diagnosis compares: long enough that the IMU's reading noise is small
// beside a turn, short enough that a run gives many of them.
const chunkNs = 500e6

// chunk is one interval [t0, t1] of a run: each wheel's travel (metres) and
// the IMU's heading change over it, in the IMU's own units (NaN without one).
type chunk struct {
	t0, t1 int64
	travel []float64
	imu    float64
}

// countDelta returns cur - prev for a counter of the given width, as a
// signed difference (the encoder counter wraps round).
func countDelta(cur, prev int64, bits int) int64 {
	if bits <= 0 || bits >= 64 {
		return cur - prev
	}
	d := uint64(cur-prev) & (1<<bits - 1)
	if d >= 1<<(bits-1) {
		return int64(d) - 1<<bits
	}
	return int64(d)
}

// chunks sums the wheel travels of odo (in stamp order) over intervals of
// about chunkNs; a gap in the intervals, a sample without wheel travels, or
// a count jump of more than a metre starts a new one.
func chunks(cfg *fusion.Config, odo []fusion.Odometry) []chunk {
	n := len(cfg.Wheels)
	var out []chunk
	var cur *chunk
	var prevCounts []int64
	var prevStamp int64
	closeCur := func() {
		if cur != nil && cur.t1 > cur.t0 {
			out = append(out, *cur)
		}
		cur = nil
	}
	add := func(t0, t1 int64, travel []float64) {
		if cur != nil && cur.t1 != t0 {
			closeCur()
		}
		if cur == nil {
			cur = &chunk{t0: t0, t1: t0, travel: make([]float64, n)}
		}
		cur.t1 = t1
		for i, v := range travel {
			cur.travel[i] += v
		}
		if cur.t1-cur.t0 >= chunkNs {
			closeCur()
		}
	}
	travel := make([]float64, n)
	for k := range odo {
		o := &odo[k]
		switch {
		case len(o.TravelM) == n && n > 0 && o.StartNs < o.StampNs:
			add(o.StartNs, o.StampNs, o.TravelM)
		case len(o.Counts) == n && n > 0:
			if prevCounts != nil && o.StampNs > prevStamp {
				ok := true
				for i, w := range cfg.Wheels {
					if w.CountsPerM <= 0 {
						ok = false
						break
					}
					travel[i] = float64(countDelta(o.Counts[i], prevCounts[i], w.CounterBits)) / w.CountsPerM
					ok = ok && math.Abs(travel[i]) < 1
				}
				if ok {
					add(prevStamp, o.StampNs, travel)
				} else {
					closeCur()
				}
			}
			prevCounts = append(prevCounts[:0], o.Counts...)
			prevStamp = o.StampNs
		default:
			closeCur()
		}
	}
	closeCur()
	return out
}

// headings is an IMU's heading over time, unwrapped.
type headings struct {
	t []int64
	h []float64
	// maxAbs is the largest heading as read; degreeWraps counts the jumps
	// of about 360 between consecutive readings (a heading in degrees
	// wrapping round at +-180).
	maxAbs      float64
	degreeWraps int
}

// imuHeadings collects the IMU's headings: those that came with odometry
// (rotation mode, or absolute mode read with the wheels) and the separate
// samples, in stamp order, unwrapped. A jump of more than 300 between
// readings is taken as a degree heading wrapping round, one of more than pi
// as a radian heading wrapping round: at ordinary sample rates neither unit
// turns that far between readings.
func imuHeadings(odo []fusion.Odometry, imu []fusion.Heading) headings {
	type reading struct {
		t int64
		h float64
	}
	var rs []reading
	for k := range odo {
		if p := odo[k].IMUHeadingRad; p != nil && !math.IsNaN(*p) && !math.IsInf(*p, 0) {
			rs = append(rs, reading{odo[k].StampNs, *p})
		}
	}
	for _, h := range imu {
		if !math.IsNaN(h.HeadingRad) && !math.IsInf(h.HeadingRad, 0) {
			rs = append(rs, reading{h.StampNs, h.HeadingRad})
		}
	}
	slices.SortStableFunc(rs, func(a, b reading) int {
		switch {
		case a.t < b.t:
			return -1
		case a.t > b.t:
			return 1
		}
		return 0
	})
	var s headings
	for k, r := range rs {
		s.maxAbs = math.Max(s.maxAbs, math.Abs(r.h))
		if k > 0 && r.t == rs[k-1].t {
			continue
		}
		if k == 0 {
			s.t, s.h = append(s.t, r.t), append(s.h, r.h)
			continue
		}
		d := r.h - rs[k-1].h
		switch {
		case math.Abs(d) > 300:
			if math.Abs(d) < 420 {
				s.degreeWraps++
			}
			d -= 360 * math.Round(d/360)
		case math.Abs(d) > math.Pi:
			d = estimator.Wrap(d)
		}
		s.t, s.h = append(s.t, r.t), append(s.h, s.h[len(s.h)-1]+d)
	}
	return s
}

// at returns the unwrapped heading at t by linear interpolation, NaN
// outside the readings.
func (s *headings) at(t int64) float64 {
	i, found := slices.BinarySearch(s.t, t)
	if found {
		return s.h[i]
	}
	if i == 0 || i == len(s.t) {
		return math.NaN()
	}
	f := float64(t-s.t[i-1]) / float64(s.t[i]-s.t[i-1])
	return s.h[i-1] + f*(s.h[i]-s.h[i-1])
}
