package fusion

import "reckon.example/estimator"

// cpSlot names the checkpoint of a history entry: the filter's estimate
// after it, packed (estimator.Filter.Pack) in slot Slot of Robot.cps, and
// whether the IMU offset was initialised then. Slot 0 is none (an entry
// not yet applied, such as a held one). Keeping the estimates out of the
// entries keeps an entry small whatever the state size (a state of 12 is
// 1.2 kB as an estimator.State): the window shifts and copies entries.
type cpSlot struct {
	Slot        int32
	offsetReady bool
}

// slotData returns the packed estimate of slot s (from 1).
func (r *Robot) slotData(s int32) []float64 {
	k := r.cpSize
	return r.cps[int(s-1)*k : int(s)*k]
}

// newSlot returns a free slot.
func (r *Robot) newSlot() int32 {
	if n := len(r.cpFree); n > 0 {
		s := r.cpFree[n-1]
		r.cpFree = r.cpFree[:n-1]
		return s
	}
	r.cps = append(r.cps, make([]float64, r.cpSize)...)
	return int32(len(r.cps) / r.cpSize)
}

// freeSlot gives back the slot of c, if it has one.
func (r *Robot) freeSlot(c *cpSlot) {
	if c.Slot != 0 {
		r.cpFree = append(r.cpFree, c.Slot)
		c.Slot = 0
	}
}

// storeCheckpoint writes the filter's estimate into c's slot, taking one
// if c has none.
func (r *Robot) storeCheckpoint(c *cpSlot) {
	if c.Slot == 0 {
		c.Slot = r.newSlot()
	}
	d := r.slotData(c.Slot)
	r.f.Pack(d)
	if len(r.lmAt) > 0 {
		packTable(d[len(d)-lmWords:], &r.lm)
	}
	c.offsetReady = r.ready
}

// loadCheckpoint sets the filter to c's estimate.
func (r *Robot) loadCheckpoint(c *cpSlot) {
	d := r.slotData(c.Slot)
	r.f.Unpack(d)
	if len(r.lmAt) > 0 {
		unpackTable(&r.lm, d[len(d)-lmWords:])
	}
	r.ready = c.offsetReady
}

// checkpointOf returns the checkpoint c names as a value (the zero State
// for none).
func (r *Robot) checkpointOf(c *cpSlot) checkpoint {
	var cp checkpoint
	r.loadInto(&cp, c)
	return cp
}

// loadInto sets cp to the checkpoint c names (the zero State for none),
// copying only the states in use.
func (r *Robot) loadInto(cp *checkpoint, c *cpSlot) {
	cp.offsetReady = c.offsetReady
	cp.lm = lmTable{}
	if c.Slot != 0 && len(r.lmAt) > 0 {
		d := r.slotData(c.Slot)
		unpackTable(&cp.lm, d[len(d)-lmWords:])
	}
	r.loadEst(&cp.est, c)
}

// loadEst sets dst to the estimate c names (the zero State for none),
// copying only the states in use.
func (r *Robot) loadEst(dst *estimator.State, c *cpSlot) {
	if c.Slot == 0 {
		*dst = estimator.State{}
		return
	}
	dst.SetPacked(r.n, r.layout.Angles(), r.slotData(c.Slot)[:r.f.PackedSize()])
}

// setCheckpoint stores the checkpoint cp (of the robot's state size, or
// the zero State for none) into c, for restoring a snapshot.
func (r *Robot) setCheckpoint(c *cpSlot, cp *checkpoint) {
	c.offsetReady = cp.offsetReady
	if cp.est.Size() == 0 {
		return
	}
	if c.Slot == 0 {
		c.Slot = r.newSlot()
	}
	d := r.slotData(c.Slot)
	cp.est.MeanInto(d[:r.n])
	cp.est.CovarianceInto(d[r.n:])
	if k := r.n + r.n*r.n; r.layout.TurnScale() >= 0 {
		m, c := cp.est.EIV(), cp.est.EIVConsider()
		copy(d[k:], m[:])
		copy(d[k+len(m):k+len(m)+r.n], c[:r.n])
	}
	if k := r.f.PackedSize(); r.layout.GyroScale() >= 0 {
		d[k-3], d[k-2], d[k-1] = cp.est.IMUGyro()
	}
	if len(r.lmAt) > 0 {
		packTable(d[len(d)-lmWords:], &cp.lm)
	}
}
