package calib

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/fusion"
)

// WhitenessLags is how many lags the whiteness test looks at.
const WhitenessLags = 10

// SensorCheck is the consistency of one sensor's innovations ("imu" for
// the IMU headings) over a replayed run: their mean NIS against its band,
// and their whiteness.
type SensorCheck struct {
	SensorID string
	// Count is how many innovations the sensor had, DOF the sum of their
	// dimensions.
	Count, DOF int
	// MeanNIS is the mean NIS per innovation; Lo and Hi bound its
	// two-sided 95% band, [chi2_DOF(0.025), chi2_DOF(0.975)] / Count
	// (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2). A Student-t
	// sensor's NIS is not chi-square: its band says little.
	MeanNIS, Lo, Hi float64
	// MaxAutocorr is the largest absolute sample autocorrelation of the
	// whitened innovations (each component on its own) over lags 1 to
	// WhitenessLags, at MaxLag; Bound is Mehra's 95% bound 1.96 / sqrt(N)
	// for N innovations (R. K. Mehra, IEEE Trans. Automatic Control 15(2),
	// 1970); Outside of Tested (component, lag) pairs lie beyond it.
	MaxAutocorr, Bound float64
	MaxLag             int
	Outside, Tested    int
}

// NISInBand reports whether the mean NIS lies in its band.
func (c *SensorCheck) NISInBand() bool { return c.MeanNIS >= c.Lo && c.MeanNIS <= c.Hi }

// White reports whether the innovations pass Mehra's whiteness test: at
// most 5% of the autocorrelations beyond the bound (and at least one
// tested).
func (c *SensorCheck) White() bool {
	return c.Tested > 0 && float64(c.Outside) <= 0.05*float64(c.Tested)
}

// checks replays the run at values and returns each sensor's check (in
// the order the sensors first appear), the log-likelihood and how many
// innovations it summed.
func (p *replayer) checks(values []float64) ([]SensorCheck, float64, int, error) {
	type series struct {
		nis  float64
		dof  int
		comp [3][]float64
	}
	var order []string
	all := map[string]*series{}
	var ll float64
	var n int
	err := p.run(values, func(in *fusion.Innovation, nu float64) {
		o := &in.Outcome
		ll += innovationLogLik(o.NIS, o.LogDetS, o.Dim, nu)
		n++
		s := all[in.SensorID]
		if s == nil {
			s = &series{}
			all[in.SensorID] = s
			order = append(order, in.SensorID)
		}
		s.nis += o.NIS
		s.dof += o.Dim
		for i := 0; i < o.Dim; i++ {
			s.comp[i] = append(s.comp[i], o.Whitened[i])
		}
	})
	if err != nil {
		return nil, 0, 0, err
	}
	if n == 0 {
		return nil, 0, 0, ErrNoInnovations
	}
	out := make([]SensorCheck, 0, len(order))
	for _, id := range order {
		s := all[id]
		c := SensorCheck{SensorID: id, Count: len(s.comp[0]), DOF: s.dof}
		c.MeanNIS = s.nis / float64(c.Count)
		chi := distuv.ChiSquared{K: float64(s.dof)}
		c.Lo, c.Hi = chi.Quantile(0.025)/float64(c.Count), chi.Quantile(0.975)/float64(c.Count)
		c.Bound = 1.96 / math.Sqrt(float64(c.Count))
		for _, w := range s.comp {
			if len(w) <= WhitenessLags+1 {
				continue
			}
			for lag := 1; lag <= WhitenessLags; lag++ {
				r := autocorr(w, lag)
				c.Tested++
				if math.Abs(r) > c.Bound {
					c.Outside++
				}
				if math.Abs(r) > math.Abs(c.MaxAutocorr) {
					c.MaxAutocorr, c.MaxLag = r, lag
				}
			}
		}
		out = append(out, c)
	}
	return out, ll, n, nil
}

// autocorr returns the sample autocorrelation of w at lag: the
// autocovariance at lag over the variance, both about the sample mean and
// over len(w) (Mehra 1970, eq. 13; Box and Jenkins).
func autocorr(w []float64, lag int) float64 {
	var m float64
	for _, v := range w {
		m += v
	}
	m /= float64(len(w))
	var c0, cl float64
	for i, v := range w {
		c0 += (v - m) * (v - m)
		if i+lag < len(w) {
			cl += (v - m) * (w[i+lag] - m)
		}
	}
	if c0 == 0 {
		return 0
	}
	return cl / c0
}
