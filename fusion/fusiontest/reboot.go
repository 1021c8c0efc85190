package fusiontest

// Reboot returns the inputs from index at on (arrival order) as a
// controller that restarted just before ins[at] would send them: every
// stamp counted from the newest odometry before at (the restart; the
// controller's clock starts again at 0 there), cumulative counts counted
// from that sample's counts (its counters start again at 0), and the
// inputs stamped at or before the restart left out (a camera's late fix of
// the old clock, lost with the reboot). The truth stays the field's. The
// inputs are copied; ins is not changed.
func Reboot(ins []Input, at int) []Input {
	var restartNs int64
	var counts []int64
	for i := at - 1; i >= 0; i-- {
		if o := ins[i].Odometry; o != nil {
			restartNs, counts = o.StampNs, o.Counts
			break
		}
	}
	var out []Input
	for _, in := range ins[at:] {
		if in.StampNs() <= restartNs {
			continue
		}
		in.ArrivalNs -= restartNs
		switch {
		case in.Odometry != nil:
			o := *in.Odometry
			o.StampNs -= restartNs
			if o.Counts != nil {
				o.Counts = make([]int64, len(in.Odometry.Counts))
				for k, c := range in.Odometry.Counts {
					o.Counts[k] = c - counts[k]
				}
			} else {
				o.StartNs = max(o.StartNs-restartNs, 0)
			}
			in.Odometry = &o
		case in.Heading != nil:
			h := *in.Heading
			h.StampNs -= restartNs
			in.Heading = &h
		default:
			f := *in.Fix
			f.StampNs -= restartNs
			in.Fix = &f
		}
		out = append(out, in)
	}
	return out
}
