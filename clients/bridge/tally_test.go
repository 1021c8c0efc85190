package bridge

import (
	"testing"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
)

// TestTallyNotTaken: a sample refused UNAVAILABLE (the robot paused) counts
// as not taken, apart from the verdicts; one refused for its value counts
// as invalid; a held sample's resolution moves it to its final verdict.
func TestTallyNotTaken(t *testing.T) {
	sum := Summary{Verdicts: map[pb.Verdict]int{}}
	for _, r := range []*pb.IngestResponse{
		{ClientSequence: 1, Verdict: pb.Verdict_VERDICT_INVALID, StatusCode: int32(codes.Unavailable), Reason: "robot: robots/cart is paused (journal disk full)"},
		{ClientSequence: 2, Verdict: pb.Verdict_VERDICT_INVALID, StatusCode: int32(codes.InvalidArgument), Reason: "sample.fix.covariance"},
		{ClientSequence: 3, Sequence: 7, Verdict: pb.Verdict_VERDICT_HELD},
		{ClientSequence: 4, Sequence: 8, Verdict: pb.Verdict_VERDICT_APPLIED, Resolved: []*pb.Resolution{{Sequence: 7, Verdict: pb.Verdict_VERDICT_GATED}}},
	} {
		tally(&sum, r)
	}
	want := map[pb.Verdict]int{pb.Verdict_VERDICT_INVALID: 1, pb.Verdict_VERDICT_HELD: 0, pb.Verdict_VERDICT_APPLIED: 1, pb.Verdict_VERDICT_GATED: 1}
	for v, n := range want {
		if sum.Verdicts[v] != n {
			t.Errorf("%v: %d, want %d (all: %v)", v, sum.Verdicts[v], n, sum.Verdicts)
		}
	}
	if sum.NotTaken != 1 || len(sum.Reasons) != 2 {
		t.Errorf("not taken %d, reasons %q", sum.NotTaken, sum.Reasons)
	}
}

// TestPendingRunAnswered: a run start is settled by its own verdict, taken
// or refused for good; not taken (the robot paused) it is to be sent again;
// other samples' verdicts and responses carrying only resolutions leave it
// as it was.
func TestPendingRunAnswered(t *testing.T) {
	run := &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: BootID(2)}}}
	for _, c := range []struct {
		name       string
		resp       *pb.IngestResponse
		sent, done bool
	}{
		{"taken", &pb.IngestResponse{ClientSequence: 5, Sequence: 9, Verdict: pb.Verdict_VERDICT_APPLIED}, true, true},
		{"refused", &pb.IngestResponse{ClientSequence: 5, Verdict: pb.Verdict_VERDICT_INVALID, StatusCode: int32(codes.FailedPrecondition)}, true, true},
		{"not taken", &pb.IngestResponse{ClientSequence: 5, Verdict: pb.Verdict_VERDICT_INVALID, StatusCode: int32(codes.Unavailable)}, false, false},
		{"another sample", &pb.IngestResponse{ClientSequence: 6, Sequence: 10, Verdict: pb.Verdict_VERDICT_APPLIED}, true, false},
		{"resolutions only", &pb.IngestResponse{Resolved: []*pb.Resolution{{Sequence: 7, Verdict: pb.Verdict_VERDICT_APPLIED}}}, true, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			r := pendingRun{sample: run, seq: 5, sent: true}
			r.answered(c.resp)
			if r.sent != c.sent || r.done != c.done {
				t.Errorf("sent %v, done %v; want %v, %v", r.sent, r.done, c.sent, c.done)
			}
		})
	}
}
