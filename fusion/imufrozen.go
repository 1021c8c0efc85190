package fusion

import "math"

// A frozen IMU: its driver goes on sending its last heading after the
// device stopped answering (common practice: drivers publish a cached
// value rather than nothing). The slip comparison (slip.go) takes every
// disagreement between the IMU and the wheels for wheels that slipped,
// so the heading followed the frozen value, trusted: a cart turning at
// 2 rad/s was 1 rad off after 0.5 s with a heading standard deviation of
// 0.035 rad (TestFrozenIMUDistrusted). An honest IMU's readings differ in
// their low bits from one to the next, the more so while the robot turns;
// readings equal in every bit over a turn of frozenTurnRad are no
// measurement of it.
const (
	// frozenTurnRad is the least turn of the wheels over which unchanged
	// IMU headings raise TrustIMUUnchanged: about 6 degrees, 20 standard
	// deviations of the default IMU heading noise (5 mrad), and beyond what
	// a quantised IMU holds still over (steps of 0.1 degree are common).
	frozenTurnRad = 0.1
	// frozenSpanNs bounds how far back the check reads the window (the
	// long slip comparison's horizon), so that it reads a bounded number
	// of entries at every input, even while the IMU is constant at rest.
	frozenSpanNs = turnHorizonNs
)

// imuFrozen reports whether TrustIMUUnchanged stands: raised when the
// IMU's newest headings read the same while the wheels turned
// (imuUnchanged), it stands until an IMU heading that differs comes, so
// that a heading that followed a frozen IMU through a turn is not trusted
// again once the robot drives straight.
func (t *trustState) imuFrozen(r *Robot) bool {
	if r.cfg.IMU != IMUAbsolute || len(r.cfg.Wheels) == 0 || !r.started {
		return t.frozen
	}
	i := r.newestIMU()
	switch {
	case i < 0:
	case t.frozen && r.live()[i].meas.Z[0] != t.frozenZ:
		t.frozen = false
	case !t.frozen && r.imuUnchanged(i):
		t.frozen, t.frozenZ = true, r.live()[i].meas.Z[0]
	}
	return t.frozen
}

// newestIMU returns the index of the newest IMU heading among the live
// entries ending within frozenSpanNs of the newest odometry, or -1.
func (r *Robot) newestIMU() int {
	live := r.live()
	from := r.newest - frozenSpanNs
	for i := len(live) - 1; i >= 0 && live[i].t1 >= from; i-- {
		if live[i].kind == entMeas && live[i].imu {
			return i
		}
	}
	return -1
}

// imuUnchanged reports whether the IMU headings within frozenSpanNs
// before live entry b, the newest, equal it in every bit back to an
// earlier one, and the wheels turned by frozenTurnRad or more between the
// first of them and b. It reads on past the previous heading only while
// the wheels turn at the least rate that frozenTurnRad within
// frozenSpanNs asks: a robot at rest or driving straight, whose IMU may
// well hold its heading, costs a few entries (BenchmarkOdometry, whose
// IMU holds one heading while the wheels turn slowly, took 70% longer when
// every sample read the whole span, and with this as long as without the
// check, within a shared machine's noise).
func (r *Robot) imuUnchanged(b int) bool {
	live := r.live()
	z, tb := live[b].meas.Z[0], live[b].t1
	ta, i := tb, b-1
	for ; i >= 0 && live[i].t1 >= tb-frozenSpanNs; i-- {
		e := &live[i]
		if e.kind != entMeas || !e.imu {
			continue
		}
		if e.meas.Z[0] != z {
			break
		}
		if ta == tb && math.Abs(r.turnOver(e.t1, tb))*frozenSpanNs < frozenTurnRad*float64(tb-e.t1) {
			return false
		}
		ta = e.t1
	}
	return ta != tb && math.Abs(r.turnOver(ta, tb)) >= frozenTurnRad
}

// turnOver returns the wheels' turn over [ta, tb], by the steps' time
// fractions, as the slip comparison reads it (odometryOver).
func (r *Robot) turnOver(ta, tb int64) float64 {
	var turn float64
	r.odometryOver(ta, tb, func(e *entry, f float64, _ int64) { turn += e.step.TurnRad * f })
	return turn
}
