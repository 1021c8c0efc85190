package export

import (
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// lagOdometry delays the odometry between FromS and ToS seconds by LagS
// on the way to the robot, so that fixes and headings arrive ahead of it
// and are held until it comes: the run then has held inputs with final
// verdicts decided later. With LoseHeld n > 0 the journal loses the n-th
// held input (its pair is not written, as damage in the middle of a
// journal loses one): a gap, with the input's resolution after it.
type lagOdometry struct {
	FromS, ToS, LagS float64
	LoseHeld         int
}

// writeJournal writes the journal of a simulated greenhouse-cart run for
// robot in dir, as the service would (convert.Take, then AddPair with the
// response), and returns the writer, still open.
func writeJournal(t testing.TB, dir, robot string, sc fusiontest.Scenario, lag lagOdometry) *journal.Writer {
	t.Helper()
	s := fusiontest.New(sc)
	cfg := s.Config()
	fr, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	j, err := journal.Create(dir, robot, &pb.JournalOpening{Robot: "robots/" + robot, Config: convert.ConfigToProto(cfg),
		CreateTimeUnixNs: 1_767_225_600_000_000_000}, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	var client uint64
	held := 0
	take := func(sample *pb.Sample, arrivalNs int64) {
		client++
		resp, taken := convert.Take(fr, sample, client)
		if !taken {
			return
		}
		in := &pb.JournalInput{Sequence: resp.GetSequence(), Sample: sample, ArrivalUnixNs: 1_767_225_600_000_000_000 + arrivalNs}
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			if held++; held == lag.LoseHeld {
				return
			}
		}
		if err := j.AddPair(in, &pb.JournalOutput{Response: resp}); err != nil {
			t.Fatal(err)
		}
		if resp.GetSequence()%512 == 0 {
			if _, err := j.Flush(); err != nil {
				t.Fatal(err)
			}
		}
	}
	type delayed struct {
		s   *pb.Sample
		due int64
	}
	var queue []delayed
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		for len(queue) > 0 && queue[0].due <= in.ArrivalNs {
			take(queue[0].s, queue[0].due)
			queue = queue[1:]
		}
		switch {
		case in.Odometry != nil:
			sample := convert.OdometryToProto(in.Odometry)
			if st := float64(in.Odometry.StampNs) / 1e9; st >= lag.FromS && st < lag.ToS {
				queue = append(queue, delayed{sample, in.ArrivalNs + int64(lag.LagS*1e9)})
				continue
			}
			if len(queue) > 0 { // behind the delayed ones, in order
				queue = append(queue, delayed{sample, in.ArrivalNs})
				continue
			}
			take(sample, in.ArrivalNs)
		case in.Heading != nil:
			take(convert.HeadingToProto(in.Heading), in.ArrivalNs)
		default:
			take(convert.FixToProto(in.Fix), in.ArrivalNs)
		}
	}
	for _, d := range queue {
		take(d.s, d.due)
	}
	if _, err := j.Flush(); err != nil {
		t.Fatal(err)
	}
	return j
}

// fleet writes a journal directory of two carts: cart-1 with a journal
// set aside by a delete and a live one with held fixes, cart-2 with a live
// one whose camera sends outliers. It returns the directory.
func fleet(t testing.TB) string {
	t.Helper()
	dir := t.TempDir()
	old := writeJournal(t, dir, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 3, DurationS: 12, CameraHz: 4}, lagOdometry{})
	if err := old.Remove(); err != nil {
		t.Fatal(err)
	}
	live := writeJournal(t, dir, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 71, DurationS: 30, CameraHz: 5},
		lagOdometry{FromS: 8, ToS: 12, LagS: 0.4})
	if err := live.Close(); err != nil {
		t.Fatal(err)
	}
	other := writeJournal(t, dir, "cart-2", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 5, DurationS: 25, CameraHz: 4, OutlierFraction: 0.1}, lagOdometry{})
	if err := other.Close(); err != nil {
		t.Fatal(err)
	}
	return dir
}
