package server

import (
	"fmt"
	"testing"

	"reckon.example/fusion/fusiontest"
	"reckon.example/server/journal"
)

// TestMarkerFixesRestore: pose fixes that name their marker, one marker
// read 5 m along on every frame of a 2 s pass and the cart moved by hand
// later, are journaled as they came and restored through three restarts:
// each restore serves the pose the robot had (the inputs after the last
// snapshot, version 15, replay to the journaled outputs bit for bit), and
// a checked offline replay of the whole journal reproduces every output.
// Were the markers lost on the way into the journal or out of it, the
// replay would reseed at the misread pass, as the live robot did not, and
// diverge. One recovery in all: the move by hand, not the misread marker.
func TestMarkerFixesRestore(t *testing.T) {
	dir := t.TempDir()
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 44, DurationS: 24,
		LatencyMinS: 0.05, LatencyMaxS: 0.3, Bump: &fusiontest.Bump{AtS: 15.3, DXM: 1.2, DRad: 0.4}})
	misread := 0
	for _, s := range samp {
		p := s.GetFix().GetPose()
		if p == nil {
			continue
		}
		stamp := s.GetFix().GetStampNs()
		p.Marker = fmt.Sprintf("post-%d", stamp/2e9)
		if stamp >= 6e9 && stamp < 8e9 {
			p.XM += 5
			p.Marker = "post-3-misread"
			misread++
		}
	}
	if misread < 10 {
		t.Fatalf("%d fixes misread", misread)
	}
	restartedServes(t, dir, samp, cfg)
	fr, _, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true})
	if err != nil {
		t.Fatal(err)
	}
	if n := fr.Stats().Recoveries; n != 1 {
		t.Errorf("%d recoveries, want the move by hand's alone", n)
	}
}
