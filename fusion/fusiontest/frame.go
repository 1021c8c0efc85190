package fusiontest

import (
	"fmt"
	"math"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// ToField returns p, a pose in the simulator's own frame, in the field
// frame: Compose(FieldFrame, p). With the zero FieldFrame it returns p
// unchanged, bit for bit.
func (s Scenario) ToField(p estimator.Pose) estimator.Pose {
	if s.FieldFrame == (estimator.Pose{}) {
		return p
	}
	return estimator.Compose(s.FieldFrame, p)
}

// ToLocal returns p, a field pose, in the simulator's own frame: the
// inverse of ToField.
func (s Scenario) ToLocal(p estimator.Pose) estimator.Pose {
	f := s.FieldFrame
	if f == (estimator.Pose{}) {
		return p
	}
	sh, ch := math.Sincos(f.Heading)
	dx, dy := p.X-f.X, p.Y-f.Y
	return estimator.Pose{X: ch*dx + sh*dy, Y: -sh*dx + ch*dy, Heading: estimator.Wrap(p.Heading - f.Heading)}
}

// CovToLocal returns a field pose covariance (3x3 row-major, x, y,
// heading) in the simulator's own frame: R^T P R with R the field frame's
// rotation of x and y.
func (s Scenario) CovToLocal(p [9]float64) [9]float64 {
	sh, ch := math.Sincos(s.FieldFrame.Heading)
	rt := [9]float64{ch, sh, 0, -sh, ch, 0, 0, 0, 1}
	var out [9]float64
	estimator.Sandwich(&out, &rt, &p)
	return out
}

// Landmarks returns the scenario's map in the field frame: the posts
// (Markers) or, with MarkerCount, the aisle markers.
func (s Scenario) Landmarks() []fusion.Landmark {
	out := s.localMarkers()
	for i, m := range out {
		p := s.ToField(estimator.Pose{X: m.XM, Y: m.YM})
		out[i].XM, out[i].YM = p.X, p.Y
	}
	return out
}

// localMarkers returns the map in the simulator's own frame.
func (s Scenario) localMarkers() []fusion.Landmark {
	if s.MarkerCount > 0 {
		return AisleMarkers(s.MarkerCount)
	}
	return Markers()
}

// AisleMarkers returns n markers placed along the greenhouse's first
// aisles: on the edges of the four beds beside the aisles at y = 0, 1.5 and
// 3 m (bed edges at y = -0.75, 0.75, 2.25 and 3.75 m), spread evenly along
// the 8 m of each bed, in turn from bed to bed. A real map has 10 to 20.
func AisleMarkers(n int) []fusion.Landmark {
	const beds, length = 4, 8.0
	perBed := (n + beds - 1) / beds
	out := make([]fusion.Landmark, 0, n)
	for i := 0; i < n; i++ {
		bed, j := i%beds, i/beds
		out = append(out, fusion.Landmark{
			ID: fmt.Sprintf("marker-%02d", i),
			XM: length * (float64(j) + 0.5) / float64(perBed),
			YM: -0.75 + 1.5*float64(bed),
		})
	}
	return out
}
