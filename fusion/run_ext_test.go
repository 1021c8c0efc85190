package fusion_test

import (
	"os"
	"path/filepath"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"

	"reckon.example/fusion"
)

// TestSnapshotVersion5Restores: the golden snapshot of version 5, written
// before runs existed, restores under version 6 as a robot in run 1 that
// writes the same state as version 6.
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
	if string(b) != string(want) {
		t.Errorf("version 5 restored writes %d bytes, not its own %d with the version 6 fields", len(b), len(want))
	}
}
