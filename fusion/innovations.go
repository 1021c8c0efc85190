package fusion

import "reckon.example/estimator"

// Innovation is one measurement's innovation as the run finally saw it: the
// outcome of its update once it left the history window, after every late
// input before it was inserted (so, in stamp order, the prediction-error
// decomposition of the run's likelihood; Schweppe 1965). An IMU heading
// has SensorID "imu".
type Innovation struct {
	StampNs  int64
	SensorID string
	// Outcome is the update's: raw NIS, dimension, gated or not, robust
	// weight, log det S and the whitened innovation.
	Outcome estimator.Outcome
	// Initialised marks the IMU heading that initialised the offset: it
	// has no innovation. Failed marks an update that failed.
	Initialised, Failed bool
}

// CollectInnovations makes the robot keep the innovation of every
// measurement as it becomes final; TakeInnovations hands them out.
func (r *Robot) CollectInnovations() {
	if r.innov == nil {
		r.innov = &innovationCollector{}
	}
}

// TakeInnovations returns the innovations that became final since the
// last call, in stamp order.
func (r *Robot) TakeInnovations() []Innovation {
	if r.innov == nil {
		return nil
	}
	out := r.innov.ready
	r.innov.ready = nil
	return out
}

// FinishInnovations makes every measurement of the run final and returns
// the innovations not yet taken (as FinishSteps, which it also serves: the
// robot takes no late samples older than its newest odometry afterwards).
// Held inputs that no odometry reached are left out.
func (r *Robot) FinishInnovations() []Innovation {
	if r.innov == nil {
		return nil
	}
	if n := len(r.live()); n > 0 {
		r.dropFront(n)
	}
	return r.TakeInnovations()
}

// innovationCollector keeps the outcomes of measurement entries leaving
// the window.
type innovationCollector struct {
	ready []Innovation
}

// collect takes the measurements among the first k live entries.
func (c *innovationCollector) collect(r *Robot, k int) {
	for i := range r.live()[:k] {
		e := &r.live()[i]
		if e.kind != entMeas {
			continue
		}
		c.ready = append(c.ready, Innovation{StampNs: e.t1, SensorID: r.stats.sensors[e.sensor].ID,
			Outcome: e.out, Initialised: e.initialised, Failed: e.failed})
	}
}
