package fusion

import (
	"testing"
	"unsafe"
)

// TestWindowGrowth: a new robot at 200 Hz odometry and 100 Hz IMU with a
// 1 s window (300 live entries) reallocates its entries a few times in its
// first second (doubling up to the point where reserve can tell the rate:
// seven times) and never after, and keeps them in at most twice the window
// and a margin (and the allocator's rounding to whole pages): dropped
// entries move out once they are as many as the live ones, and reserve
// sets the room aside at once.
func TestWindowGrowth(t *testing.T) {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	tr := []float64{0.002, 0.0021, 0.0001}
	var grows, later int
	var last *entry
	for k := int64(0); k < 1000; k++ { // 5 s
		r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		if k%2 == 0 {
			r.AddHeading(Heading{StampNs: (k+1)*5e6 + 2e6, HeadingRad: 0.7})
		}
		if p := &r.ents[:1][0]; p != last {
			last = p
			grows++
			if k >= 200 {
				later++
			}
		}
	}
	t.Logf("%d reallocations, %d after the first second; capacity %d for %d live entries", grows, later, cap(r.ents), len(r.live()))
	live := len(r.live())
	if grows > 8 || later > 0 {
		t.Errorf("entries reallocated %d times, %d of them after the first second; want at most 8 and 0", grows, later)
	}
	// The allocator rounds a large slice up to whole 8 KiB pages: up to 15
	// more entries of 536 bytes than asked for.
	if c, most := cap(r.ents), (windowSlack+1)*live+64+8192/int(unsafe.Sizeof(entry{})); c > most {
		t.Errorf("capacity %d for %d live entries; want at most %d", c, live, most)
	}
}
