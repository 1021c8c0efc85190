package fusion_test

import (
	"math"
	"slices"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestInnovationsInStampOrder: the innovations a robot collects are those
// of the run in stamp order (the prediction-error decomposition; Schweppe
// 1965), whatever order the inputs arrived in: camera fixes 150 ms late
// give, innovation by innovation, the NIS and log det S of the same
// samples delivered in stamp order, to 1e-9. Recording each measurement's
// outcome on arrival instead differs for every IMU heading that a fix
// captured before it overtakes.
func TestInnovationsInStampOrder(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 31, IMU: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, OutlierFraction: 0.05, DurationS: 20}
	s, arrival := collect(sc)
	stamped := slices.Clone(arrival)
	slices.SortStableFunc(stamped, func(a, b fusiontest.Input) int {
		if c := int(a.StampNs() - b.StampNs()); c != 0 || (a.Odometry != nil) == (b.Odometry != nil) {
			return c
		}
		if a.Odometry != nil { // odometry first at one stamp, as TestLateEqualsStampOrder
			return -1
		}
		return 1
	})
	run := func(ins []fusiontest.Input) (inn []fusion.Innovation, arrivalNIS map[int64]float64) {
		r, err := fusion.New(s.Config())
		if err != nil {
			t.Fatal(err)
		}
		r.CollectInnovations()
		arrivalNIS = map[int64]float64{}
		for i := range ins {
			res := fusiontest.Feed(r, &ins[i])
			if ins[i].Heading != nil && res.Verdict == fusion.VerdictApplied {
				arrivalNIS[ins[i].Heading.StampNs] = res.NIS
			}
			inn = append(inn, r.TakeInnovations()...)
		}
		return append(inn, r.FinishInnovations()...), arrivalNIS
	}
	late, onArrival := run(arrival)
	inOrder, _ := run(stamped)
	if len(late) != len(inOrder) || len(late) < 2000 {
		t.Fatalf("%d innovations late, %d in stamp order (want equal, at least 2000)", len(late), len(inOrder))
	}
	var fixes, headings, differ int
	for i := range late {
		a, b := late[i], inOrder[i]
		if a.StampNs != b.StampNs || a.SensorID != b.SensorID || a.Initialised != b.Initialised || a.Outcome.Gated != b.Outcome.Gated {
			t.Fatalf("innovation %d: late %+v, in stamp order %+v", i, a, b)
		}
		if i > 0 && a.StampNs < late[i-1].StampNs {
			t.Fatalf("innovation %d at %d before the one at %d", i, a.StampNs, late[i-1].StampNs)
		}
		for _, d := range [][2]float64{{a.Outcome.NIS, b.Outcome.NIS}, {a.Outcome.LogDetS, b.Outcome.LogDetS}} {
			if math.Abs(d[0]-d[1]) > 1e-9*math.Max(1, math.Abs(d[1])) {
				t.Errorf("innovation %d (%s at %d): late %g, in stamp order %g", i, a.SensorID, a.StampNs, d[0], d[1])
			}
		}
		switch {
		case a.SensorID == "camera" && !a.Outcome.Gated:
			fixes++
		case a.SensorID == "imu" && !a.Initialised:
			headings++
			if nis, ok := onArrival[a.StampNs]; ok && math.Abs(nis-a.Outcome.NIS) > 1e-9*math.Max(1, nis) {
				differ++
			}
		}
	}
	if fixes < 150 || headings < 1500 || differ < headings/10 {
		t.Errorf("%d applied fixes, %d IMU headings, %d of them with a final NIS other than on arrival (want at least 150, 1500 and a tenth)", fixes, headings, differ)
	}
}
