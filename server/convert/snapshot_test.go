package convert

import (
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

// snapshotDir holds the golden snapshots (see testdata/README.md).
var snapshotDir = filepath.Join("..", "..", "testdata", "snapshots")

// goldenConfig is the configuration of the robot whose snapshot
// testdata/snapshots/greenhouse-v<version>.bin is (fusion's
// TestSnapshotGolden makes it).
func goldenConfig() fusion.Config {
	cfg := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 8, DurationS: 3,
		OutlierFraction: 0.2, Bump: &fusiontest.Bump{AtS: 2, DXM: 1}}).Config()
	cfg.WindowNs = 200e6
	cfg.Calibration = fusion.Calibration{Scale: true, RateBias: true}
	cfg.Sensors[0].CorrelationTimeS, cfg.Sensors[0].CorrelatedFraction, cfg.Sensors[0].Robust = 1.5, 0.5, fusion.RobustHuber
	return cfg
}

// snapshotFields lists every field of RobotSnapshot and of the messages it
// holds: "message number name kind cardinality", sorted.
func snapshotFields() string {
	var lines []string
	seen := map[protoreflect.FullName]bool{}
	var walk func(md protoreflect.MessageDescriptor)
	walk = func(md protoreflect.MessageDescriptor) {
		if seen[md.FullName()] {
			return
		}
		seen[md.FullName()] = true
		fs := md.Fields()
		for i := 0; i < fs.Len(); i++ {
			f := fs.Get(i)
			card := f.Cardinality().String()
			if f.HasPresence() && f.Message() == nil {
				card = "explicit"
			}
			lines = append(lines, fmt.Sprintf("%s %d %s %s %s", md.FullName(), f.Number(), f.Name(), f.Kind(), card))
			if f.Message() != nil {
				walk(f.Message())
			}
		}
	}
	walk((&pb.RobotSnapshot{}).ProtoReflect().Descriptor())
	sort.Strings(lines)
	return strings.Join(lines, "\n") + "\n"
}

// TestSnapshotLayoutVersion: the fields of RobotSnapshot are those recorded
// for fusion.SnapshotVersion. Changing the message without bumping the
// version fails here; after a bump, -rewrite records the new list.
func TestSnapshotLayoutVersion(t *testing.T) {
	path := filepath.Join(snapshotDir, fmt.Sprintf("robot-snapshot-v%d.fields", fusion.SnapshotVersion))
	got := snapshotFields()
	if *rewrite {
		if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("no field list for snapshot version %d (write one with -rewrite): %v", fusion.SnapshotVersion, err)
	}
	if got != string(want) {
		t.Errorf("RobotSnapshot changed without a bump of fusion.SnapshotVersion (%d):\n got:\n%s\nwant:\n%s", fusion.SnapshotVersion, got, want)
	}
}

// unknownFields reports whether m or a message inside it holds fields its
// descriptor does not declare.
func unknownFields(m protoreflect.Message) bool {
	if len(m.GetUnknown()) > 0 {
		return true
	}
	found := false
	m.Range(func(fd protoreflect.FieldDescriptor, v protoreflect.Value) bool {
		switch {
		case fd.IsList() && fd.Message() != nil:
			for i := 0; i < v.List().Len(); i++ {
				found = found || unknownFields(v.List().Get(i).Message())
			}
		case fd.Message() != nil && !fd.IsMap():
			found = found || unknownFields(v.Message())
		}
		return !found
	})
	return found
}

// TestSnapshotDecodesWithGeneratedType: the bytes that fusion writes by hand
// decode with the generated RobotSnapshot, with no unknown fields, to the
// values the restored robot reports.
func TestSnapshotDecodesWithGeneratedType(t *testing.T) {
	b, err := os.ReadFile(filepath.Join(snapshotDir, fmt.Sprintf("greenhouse-v%d.bin", fusion.SnapshotVersion)))
	if err != nil {
		t.Fatal(err)
	}
	var m pb.RobotSnapshot
	if err := proto.Unmarshal(b, &m); err != nil {
		t.Fatalf("generated type cannot decode the snapshot: %v", err)
	}
	if unknownFields(m.ProtoReflect()) {
		t.Errorf("the snapshot holds fields RobotSnapshot does not declare")
	}
	r, err := fusion.RestoreSnapshot(goldenConfig(), b)
	if err != nil {
		t.Fatal(err)
	}
	st, pose := r.Stats(), r.Pose()
	check := func(what string, got, want any) {
		t.Helper()
		if fmt.Sprint(got) != fmt.Sprint(want) {
			t.Errorf("%s: generated type reads %v, robot has %v", what, got, want)
		}
	}
	check("version", m.GetVersion(), fusion.SnapshotVersion)
	check("sequence", m.GetSequence(), r.Sequence())
	check("newest_ns", m.GetNewestNs(), r.NewestNs())
	check("base_ns", m.GetBaseNs(), r.WindowStartNs())
	check("filter.size", m.GetFilter().GetSize(), r.StateSize())
	mean, cov := m.GetFilter().GetMean(), m.GetFilter().GetCovariance()
	n := int(m.GetFilter().GetSize())
	check("filter.mean", mean[:3], []float64{pose.Pose.X, pose.Pose.Y, pose.Pose.Heading})
	for i := 0; i < 3; i++ {
		check(fmt.Sprintf("filter.covariance row %d", i), cov[i*n:i*n+3], pose.Cov[i*3:i*3+3])
	}
	check("offset_ready", m.GetOffsetReady(), pose.IMUOffsetReady)
	check("entries", len(m.GetEntries()), st.WindowEntries)
	check("held", len(m.GetHeld()), st.Held)
	check("odometry", counts(m.GetOdometry()), st.Odometry)
	check("measurements", counts(m.GetMeasurements()), st.Measurements)
	check("slips, gaps, recoveries", []uint64{m.GetSlips(), m.GetGaps(), m.GetRecoveries()}, []uint64{st.Slips, st.Gaps, st.Recoveries})
	check("distrust", fusion.TrustReason(m.GetDistrust()), st.Distrust)
	check("sensors", len(m.GetSensors()), len(st.Sensors))
	for i, s := range m.GetSensors() {
		if i < len(st.Sensors) {
			w := st.Sensors[i]
			check("sensor", []any{s.GetSensorId(), counts(s.GetCounts()), s.GetNisSum(), s.GetDofSum(), s.GetGateProbability()},
				[]any{w.ID, w.VerdictCounts, w.NISSum, w.DOFSum, w.GateProbability})
		}
	}
	for i, e := range m.GetEntries() {
		if e.GetEndNs() < m.GetBaseNs() || e.GetEndNs() > m.GetNewestNs() || len(e.GetStep()) != 3 || e.GetAfter().GetEstimate().GetSize() != m.GetFilter().GetSize() {
			t.Errorf("entry %d: %v", i, e)
		}
	}
}

func counts(c *pb.VerdictCounts) fusion.VerdictCounts {
	return fusion.VerdictCounts{Applied: c.GetApplied(), Held: c.GetHeld(), Gated: c.GetGated(), TooOld: c.GetTooOld(), Invalid: c.GetInvalid()}
}
