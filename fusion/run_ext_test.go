package fusion_test

import (
	"fmt"
	"os"
	"path/filepath"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"

	"reckon.example/fusion"
)

// TestSnapshotVersion5Restores: the golden snapshot of version 5, written
// before runs existed, restores under the current version as a robot in run
// 1 that writes the same state under the current version.
func TestSnapshotVersion5Restores(t *testing.T) {
	cfg, _ := goldenRobot()
	old, err := os.ReadFile(filepath.Join("..", "testdata", "snapshots", "greenhouse-v5.bin"))
	if err != nil {
		t.Fatal(err)
	}
	r, err := fusion.RestoreSnapshot(cfg, old)
	if err != nil {
		t.Fatalf("a version 5 snapshot does not restore: %v", err)
	}
	if r.Run() != 1 || r.BootID() != "" || r.Sequence() == 0 {
		t.Errorf("version 5 snapshot: run %d, boot %q, sequence %d", r.Run(), r.BootID(), r.Sequence())
	}
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	// The same bytes but for the version and the run fields at the end
	// (run 0, boot id ""), as protowire writes them.
	want := append([]byte{old[0], fusion.SnapshotVersion}, old[2:]...)
	want = protowire.AppendVarint(protowire.AppendTag(want, 33, protowire.VarintType), 0)
	want = protowire.AppendString(protowire.AppendTag(want, 34, protowire.BytesType), "")
	want = withFreshScrub(want)
	if string(b) != string(want) {
		t.Errorf("version 5 restored writes %d bytes, not its own %d with the run fields", len(b), len(want))
	}
}

// TestSnapshotVersion6And7Restore: the golden snapshots of version 6,
// whose recovery candidates do not keep their odometry's white part apart
// (absent parts read as all white, and all white is written absent), and of
// version 7, which lacks the scrub's block sum, restore under the current
// version and write the same bytes but for the version and a fresh scrub
// block at the end; that of version 8, which lacks the turn scale's
// errors-in-variables moments and the odometry entries' scrub and wheels
// fields (all absent when zero), the same bytes but for the version.
func TestSnapshotVersion6And7Restore(t *testing.T) {
	cfg, _ := goldenRobot()
	for _, v := range []int{6, 7, 8} {
		old, err := os.ReadFile(filepath.Join("..", "testdata", "snapshots", fmt.Sprintf("greenhouse-v%d.bin", v)))
		if err != nil {
			t.Fatal(err)
		}
		r, err := fusion.RestoreSnapshot(cfg, old)
		if err != nil {
			t.Fatalf("a version %d snapshot does not restore: %v", v, err)
		}
		b, err := r.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		want := append([]byte{old[0], fusion.SnapshotVersion}, old[2:]...)
		if v < 8 {
			want = withFreshScrub(want)
		}
		if string(b) != string(want) {
			t.Errorf("version %d restored writes %d bytes, not its own %d with a fresh scrub block", v, len(b), len(want))
		}
	}
}

// withFreshScrub appends the scrub's block fields of a snapshot older than
// version 8 as the current version writes them: block 0, sum and peak 0.
func withFreshScrub(b []byte) []byte {
	b = protowire.AppendVarint(protowire.AppendTag(b, 35, protowire.VarintType), 0)
	b = protowire.AppendFixed64(protowire.AppendTag(b, 36, protowire.Fixed64Type), 0)
	return protowire.AppendFixed64(protowire.AppendTag(b, 37, protowire.Fixed64Type), 0)
}
