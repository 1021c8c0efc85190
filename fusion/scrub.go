package fusion

import "math"

// Scrub in turns (DEVELOPERS.md, "Design: Process noise"): the heading
// variance that wheels scrubbing sideways in a turn add,
// turn_var_rad2_per_rad per radian turned. Taken on each interval's own
// reported turn, it grew with the sampling rate: on a straight the reported
// turn is the wheels' noise alone, and the absolute values of that noise do
// not cancel, so at f samples a second they summed to a phantom turn that
// grows as sqrt(f) (0.126 rad/s at 200 Hz for a drive with 1e-4 m^2/m of
// wheel noise). No function of one interval's noisy turn adds up to the
// absolute true turn; the signed turn does. So the scrub is charged on the
// signed turn summed over fixed blocks of scrubBlockNs of the robot's clock:
// within a block, each interval adds the rise of the running peak of the
// block's |sum|. Turning one way, that is exactly abs(dth) of each interval
// (the charge of a noise-free drive is unchanged); on a straight, the
// wheels' noise charges about the peak of a random walk over one block,
// which no longer grows with the rate (it converges as the rate rises; from
// 50 to 500 Hz it moves by a tenth of itself, TestScrubRateInvariant). The
// price: a turn that reverses within one block is charged its larger part,
// not both.
//
// The charge depends on the odometry alone, in stamp order, so a late fix
// replayed through the window finds the same steps as one that came in
// order; the block's state is in the snapshot.
const scrubBlockNs = 250e6

// scrubState is the block the scrub's turn sum belongs to, the signed turn
// summed in it (rad) and the largest absolute value that sum reached.
type scrubState struct {
	block     int64
	sum, peak float64
}

// floorDiv is a / b rounded towards minus infinity (b > 0).
func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}

// charge adds an interval [t0, t1] that turned dth (rad) to the blocks and
// returns the turn to charge scrub on, the rise of the blocks' peaks. The
// turn is spread over the interval by time. A long interval's whole blocks
// are charged at once (each fresh block's peak is its own part), so the
// work does not grow with the interval's length.
func (s *scrubState) charge(t0, t1 int64, dth float64) float64 {
	if t1 <= t0 {
		return math.Abs(dth)
	}
	length := float64(t1 - t0)
	var total float64
	add := func(blk int64, part float64) {
		if blk != s.block {
			s.block, s.sum, s.peak = blk, 0, 0
		}
		s.sum += part
		if m := math.Abs(s.sum); m > s.peak {
			total += m - s.peak
			s.peak = m
		}
	}
	first, last := floorDiv(t0, scrubBlockNs), floorDiv(t1-1, scrubBlockNs)
	if first == last {
		add(first, dth)
		return total
	}
	end := (first + 1) * scrubBlockNs
	add(first, dth*float64(end-t0)/length)
	if whole := last - first - 1; whole > 0 {
		total += math.Abs(dth) * float64(whole) * scrubBlockNs / length
	}
	start := last * scrubBlockNs
	add(last, dth*float64(t1-start)/length)
	return total
}
