package fusion_test

import (
	"fmt"
	"math"
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
	want = withSensorRobust(t, cfg, withFreshScrub(want))
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
		want = withSensorRobust(t, cfg, want)
		if string(b) != string(want) {
			t.Errorf("version %d restored writes %d bytes, not its own %d with a fresh scrub block", v, len(b), len(want))
		}
	}
}

// withSensorRobust returns the snapshot b with each sensor record (field
// 15) given its robust weighting and parameter (fields 6 and 7, version 14)
// from cfg, as a robot restored from a snapshot older than version 14
// writes them: the IMU's none and 0.
func withSensorRobust(t *testing.T, cfg fusion.Config, b []byte) []byte {
	t.Helper()
	var out []byte
	for len(b) > 0 {
		num, typ, n := protowire.ConsumeTag(b)
		m := protowire.ConsumeFieldValue(num, typ, b[n:])
		if n < 0 || m < 0 {
			t.Fatalf("snapshot does not parse")
		}
		if num != 15 {
			out = append(out, b[:n+m]...)
			b = b[n+m:]
			continue
		}
		rec, _ := protowire.ConsumeBytes(b[n:])
		robust, param := fusion.RobustNone, 0.0
		for r := rec; len(r) > 0; {
			f, ft, k := protowire.ConsumeTag(r)
			l := protowire.ConsumeFieldValue(f, ft, r[k:])
			if f == 1 {
				id, _ := protowire.ConsumeString(r[k:])
				for _, s := range cfg.Sensors {
					if s.ID == id {
						robust, param = s.Robust, s.RobustParameter
						if param == 0 && robust == fusion.RobustHuber {
							param = fusion.DefaultHuberK
						}
					}
				}
			}
			r = r[k+l:]
		}
		rec = append(append([]byte(nil), rec...), protowire.AppendTag(nil, 6, protowire.VarintType)...)
		rec = protowire.AppendVarint(rec, uint64(robust))
		rec = protowire.AppendFixed64(protowire.AppendTag(rec, 7, protowire.Fixed64Type), math.Float64bits(param))
		out = protowire.AppendBytes(protowire.AppendTag(out, 15, protowire.BytesType), rec)
		b = b[n+m:]
	}
	return out
}

// withFreshScrub appends the scrub's block fields of a snapshot older than
// version 8 as the current version writes them: block 0, sum and peak 0.
func withFreshScrub(b []byte) []byte {
	b = protowire.AppendVarint(protowire.AppendTag(b, 35, protowire.VarintType), 0)
	b = protowire.AppendFixed64(protowire.AppendTag(b, 36, protowire.Fixed64Type), 0)
	return protowire.AppendFixed64(protowire.AppendTag(b, 37, protowire.Fixed64Type), 0)
}
