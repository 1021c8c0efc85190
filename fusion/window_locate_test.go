package fusion

import (
	"sort"
	"testing"
)

// TestLocateMatchesBisection: locate, which gallops back from the newest
// entry, finds the index a plain bisection of the whole window finds
// (sort.Search, the definition) for stamps before, inside, between and
// after the entries, on a full window with IMU headings inserted late
// (measurement entries share their stamp with the odometry split there).
func TestLocateMatchesBisection(t *testing.T) {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	tr := []float64{0.002, 0.0021, 0.0001}
	for k := int64(0); k < 400; k++ {
		r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		if k%2 == 1 {
			r.AddHeading(Heading{StampNs: (k+1)*5e6 - 2e6, HeadingRad: 0.7}) // 2 ms late: inserted
		}
	}
	live := r.live()
	if len(live) < 200 {
		t.Fatalf("%d live entries; want a full window", len(live))
	}
	var stamps []int64
	for _, e := range live {
		stamps = append(stamps, e.t0-1, e.t0, e.t1-1, e.t1, e.t1+1)
	}
	stamps = append(stamps, r.baseT-1e9, r.newest+1e9)
	for _, ts := range stamps {
		want := sort.Search(len(live), func(i int) bool { return live[i].t1 > ts })
		if got := r.locate(ts); got != want {
			t.Errorf("locate(%d) = %d, want %d (of %d live entries)", ts, got, want, len(live))
		}
	}
}

// TestTrustWindowDimensionsKept: the trust windows' dimension sums, kept as
// values come and go, equal their sums, and come back so from a snapshot.
func TestTrustWindowDimensionsKept(t *testing.T) {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	tr := []float64{0.002, 0.0021, 0.0001}
	for k := int64(0); k < 600; k++ { // 3 s: the IMU window fills and turns over
		r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		if k%2 == 1 {
			r.AddHeading(Heading{StampNs: (k+1)*5e6 - 2e6, HeadingRad: 0.7})
		}
	}
	check := func(what string, r *Robot) {
		for _, w := range []*nisWindow{&r.trust.fixes, &r.trust.imu} {
			sum := 0
			for _, d := range w.dims {
				sum += d
			}
			if w.dof != sum {
				t.Errorf("%s: kept dimension sum %d, dimensions sum to %d", what, w.dof, sum)
			}
		}
	}
	check("running", r)
	if r.trust.imu.fill < len(r.trust.imu.nis) || r.trust.imu.dof == 0 {
		t.Fatalf("IMU window %d of %d filled, dimension sum %d; want it full", r.trust.imu.fill, len(r.trust.imu.nis), r.trust.imu.dof)
	}
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	back, err := RestoreSnapshot(r.Config(), b)
	if err != nil {
		t.Fatal(err)
	}
	check("restored", back)
}
