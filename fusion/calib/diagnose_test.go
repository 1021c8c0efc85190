package calib

import (
	"math"
	"slices"
	"strings"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// run is a simulated run's configuration and samples, as the robot got them.
type run struct {
	cfg fusion.Config
	odo []fusion.Odometry
	imu []fusion.Heading
}

// simulate runs the greenhouse cart of layout for 60 s with an IMU (an
// absolute one where the layout does not need it), its noise on.
func simulate(t *testing.T, layout fusiontest.Layout, counts bool) run {
	t.Helper()
	sm := fusiontest.New(fusiontest.Scenario{Layout: layout, Seed: 3, IMU: layout != fusiontest.GyroTurn, Counts: counts})
	r := run{cfg: sm.Config()}
	for {
		in, ok := sm.Next()
		if !ok {
			break
		}
		switch {
		case in.Odometry != nil:
			r.odo = append(r.odo, *in.Odometry)
		case in.Heading != nil:
			r.imu = append(r.imu, *in.Heading)
		}
	}
	if len(r.odo) < 1000 || (r.cfg.IMU == fusion.IMUAbsolute && len(r.imu) < 1000) {
		t.Fatalf("%v: %d odometry and %d IMU samples, too few", layout, len(r.odo), len(r.imu))
	}
	return r
}

// The wiring mistakes, injected into a copy of a run's samples.

func negateWheel(i int) func(*run) {
	return func(r *run) {
		for k := range r.odo {
			o := &r.odo[k]
			if o.TravelM != nil {
				o.TravelM = slices.Clone(o.TravelM)
				o.TravelM[i] = -o.TravelM[i]
			}
			if o.Counts != nil {
				o.Counts = slices.Clone(o.Counts)
				o.Counts[i] = -o.Counts[i]
			}
		}
	}
}

func swapWheels(i, j int) func(*run) {
	return func(r *run) {
		for k := range r.odo {
			o := &r.odo[k]
			o.TravelM = slices.Clone(o.TravelM)
			o.TravelM[i], o.TravelM[j] = o.TravelM[j], o.TravelM[i]
		}
	}
}

// mapIMU replaces every IMU heading h by f(h).
func mapIMU(f func(float64) float64) func(*run) {
	return func(r *run) {
		for k := range r.imu {
			r.imu[k].HeadingRad = f(r.imu[k].HeadingRad)
		}
		for k := range r.odo {
			if p := r.odo[k].IMUHeadingRad; p != nil {
				v := f(*p)
				r.odo[k].IMUHeadingRad = &v
			}
		}
	}
}

var (
	negateIMU = mapIMU(func(h float64) float64 { return -h })
	// degreesIMU: the heading in degrees, wrapping round at 180 as such
	// firmware does.
	degreesIMU = mapIMU(func(h float64) float64 {
		d := h * 180 / math.Pi
		return d - 360*math.Round(d/360)
	})
)

func (r run) clone() run {
	c := r
	c.odo = slices.Clone(r.odo)
	c.imu = slices.Clone(r.imu)
	return c
}

// TestDiagnoseNamesWiringMistakes: each wiring mistake injected into a
// simulated run is named, with the field to change; where the layout cannot
// tell two mistakes apart (an IMU turning the other way and swapped left and
// right wheels, mirror images of each other) both are named; a correct robot
// gets no finding but notes of what its layout cannot check.
func TestDiagnoseNamesWiringMistakes(t *testing.T) {
	const mirror = "wheels[0] and wheels[1] or imu"
	type want struct {
		field, phrase string
		slope         float64 // expected slope (relative tolerance 10%), 0 to skip
	}
	cases := []struct {
		layout fusiontest.Layout
		counts bool
		name   string
		inject func(*run)
		want   *want // nil: no mistake named
	}{
		{fusiontest.FreeWheelTurn, false, "correct", nil, nil},
		{fusiontest.FreeWheelTurn, false, "left wheel backwards", negateWheel(0), &want{"wheels[0].direction_rad", "wheels[0] (left) counts backwards", -1}},
		{fusiontest.FreeWheelTurn, false, "right wheel backwards", negateWheel(1), &want{"wheels[1].direction_rad", "wheels[1] (right) counts backwards", -1}},
		{fusiontest.FreeWheelTurn, false, "lateral wheel backwards", negateWheel(2), nil}, // no other row sees sideways motion
		{fusiontest.FreeWheelTurn, false, "IMU reversed", negateIMU, &want{mirror, "the IMU turns the other way", -1}},
		{fusiontest.FreeWheelTurn, false, "IMU in degrees", degreesIMU, &want{"imu", "the IMU reports degrees", 180 / math.Pi}},
		{fusiontest.FreeWheelTurn, false, "wheels swapped", swapWheels(0, 1), &want{mirror, "are swapped", -1}},
		{fusiontest.DriveWheelTurn, false, "correct", nil, nil},
		{fusiontest.DriveWheelTurn, false, "left wheel backwards", negateWheel(0), &want{"wheels[0].direction_rad", "wheels[0] (left) counts backwards", -1}},
		{fusiontest.DriveWheelTurn, true, "right wheel counts backwards", negateWheel(1), &want{"wheels[1].direction_rad", "wheels[1] (right) counts backwards", -1}},
		{fusiontest.DriveWheelTurn, false, "IMU reversed", negateIMU, &want{mirror, "the IMU turns the other way", -1}},
		{fusiontest.DriveWheelTurn, false, "IMU in degrees", degreesIMU, &want{"imu", "the IMU reports degrees", 180 / math.Pi}},
		{fusiontest.DriveWheelTurn, false, "wheels swapped", swapWheels(0, 1), &want{mirror, "are swapped", -1}},
		{fusiontest.DriveWheelTurn, true, "correct with counts", nil, nil},
		{fusiontest.DriveWheelTurn, false, "IMU in degrees, reversed", mapIMU(func(h float64) float64 {
			d := -h * 180 / math.Pi
			return d - 360*math.Round(d/360)
		}), &want{"imu", "the IMU reports degrees and turns the other way", -180 / math.Pi}},
		{fusiontest.DriveWheelTurn, false, "IMU converted twice", mapIMU(func(h float64) float64 { return h * math.Pi / 180 }),
			&want{"imu", "57.3 times too small", math.Pi / 180}},
		{fusiontest.GyroTurn, false, "correct", nil, nil},
		// The gyro is the only turn source: its sign and the wheels'
		// directions cannot be checked, only its unit.
		{fusiontest.GyroTurn, false, "IMU in degrees", degreesIMU, &want{"imu", "the IMU reports degrees", 0}},
		{fusiontest.GyroTurn, false, "IMU reversed", negateIMU, nil},
		{fusiontest.GyroTurn, false, "forward wheel backwards", negateWheel(0), nil},
	}
	runs := map[[2]any]run{}
	for _, tc := range cases {
		t.Run(tc.layout.String()+"/"+tc.name, func(t *testing.T) {
			key := [2]any{tc.layout, tc.counts}
			base, ok := runs[key]
			if !ok {
				base = simulate(t, tc.layout, tc.counts)
				runs[key] = base
			}
			r := base.clone()
			if tc.inject != nil {
				tc.inject(&r)
			}
			var named, notes []Finding
			for _, f := range Diagnose(r.cfg, r.odo, r.imu) {
				if f.Undetermined {
					notes = append(notes, f)
				} else {
					named = append(named, f)
				}
			}
			for _, f := range notes {
				t.Logf("note: %s: %s", f.Field, f.Sentence)
			}
			if tc.want == nil {
				if len(named) != 0 {
					t.Fatalf("named %+v, want none", named)
				}
				return
			}
			if len(named) != 1 {
				t.Fatalf("named %+v, want one finding on %s", named, tc.want.field)
			}
			f := named[0]
			t.Logf("%s: %s (slope %.3f, R2 %.3f)", f.Field, f.Sentence, f.Slope, f.R2)
			if f.Field != tc.want.field || !strings.Contains(f.Sentence, tc.want.phrase) {
				t.Errorf("named %q: %q, want %q saying %q", f.Field, f.Sentence, tc.want.field, tc.want.phrase)
			}
			if tc.want.slope != 0 && !(math.Abs(f.Slope/tc.want.slope-1) < 0.1 && f.R2 > 0.9) {
				t.Errorf("slope %.3f, R2 %.3f: want slope %.3f within 10%% and R2 above 0.9", f.Slope, f.R2, tc.want.slope)
			}
		})
	}
}

// TestDiagnoseNeedsExcitation: a run that only drives straight cannot check
// the IMU, and says so instead of naming a mistake.
func TestDiagnoseNeedsExcitation(t *testing.T) {
	r := simulate(t, fusiontest.DriveWheelTurn, false)
	// The first 15 s drive the first aisle, with no turn.
	cut := func(n int64) int {
		return slices.IndexFunc(r.odo, func(o fusion.Odometry) bool { return o.StampNs > n })
	}
	r.odo = r.odo[:cut(15e9)]
	negateIMU(&r)
	fs := Diagnose(r.cfg, r.odo, r.imu)
	var said bool
	for _, f := range fs {
		if !f.Undetermined {
			t.Errorf("named %+v on a straight run", f)
		}
		said = said || (f.Field == "imu" && strings.Contains(f.Sentence, "too little"))
	}
	if !said {
		t.Errorf("findings %+v do not say the run turns too little", fs)
	}
}

// TestDiagnoseInvalidConfig: a configuration that does not validate is the
// finding, naming its field.
func TestDiagnoseInvalidConfig(t *testing.T) {
	r := simulate(t, fusiontest.DriveWheelTurn, false)
	r.cfg.Wheels = r.cfg.Wheels[:1]
	fs := Diagnose(r.cfg, r.odo, r.imu)
	if len(fs) != 1 || fs[0].Field != "wheels" || fs[0].Undetermined {
		t.Errorf("findings %+v, want one on wheels", fs)
	}
}

// TestDiagnoseSensors: a camera whose mount is left out of the
// configuration (truth 0.15 m ahead), and one that stamps its fixes at
// arrival (50 to 200 ms after capture), are named with the field to
// change; a correct robot gets no finding (simulator truth).
func TestDiagnoseSensors(t *testing.T) {
	for _, tc := range []struct {
		name    string
		arrival bool
		noMount bool
		field   string // "" for no finding
		phrase  string
	}{
		{"correct", false, false, "", ""},
		{"mount missing", false, true, "sensors[0].mount", "mount is missing"},
		{"stamped at arrival", true, false, "sensors[0].latency_ns", "correlate with the velocity"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := simulateSys(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 7, DurationS: 90, OutlierFraction: 0.05,
				Errors: fusiontest.Errors{CameraStampAtArrival: tc.arrival}})
			cfg := r.cfg
			if tc.noMount {
				cfg.Sensors = slices.Clone(cfg.Sensors)
				cfg.Sensors[0].Mount = estimator.Pose{}
			}
			fs := DiagnoseSensors(cfg, r.odo, r.fixes)
			for _, f := range fs {
				t.Logf("%s: %s", f.Field, f.Sentence)
			}
			if tc.field == "" {
				if len(fs) != 0 {
					t.Errorf("findings %+v on a correct robot", fs)
				}
				return
			}
			if len(fs) != 1 || fs[0].Field != tc.field || !strings.Contains(fs[0].Sentence, tc.phrase) {
				t.Errorf("findings %+v, want one on %s saying %q", fs, tc.field, tc.phrase)
			}
		})
	}
}
