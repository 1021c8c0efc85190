package journal

import (
	"bytes"
	"testing"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// TestAddSessionPairMatchesRecords: an input with its ingest session and
// client sequence is framed with the bytes of the JournalRecord messages.
func TestAddSessionPairMatchesRecords(t *testing.T) {
	in := &pb.JournalInput{Sequence: 12, Sample: pair(7)[0].GetInput().GetSample(), ArrivalUnixNs: 99,
		SessionId: "5f0c2a9e-session", ClientSequence: 300}
	out := &pb.JournalOutput{Response: &pb.IngestResponse{ClientSequence: 300, Sequence: 12, Verdict: pb.Verdict_VERDICT_APPLIED}}
	want, _ := AppendFrame(nil, &pb.JournalRecord{Entry: &pb.JournalRecord_Input{Input: in}})
	want, _ = AppendFrame(want, &pb.JournalRecord{Entry: &pb.JournalRecord_Output{Output: out}})
	sample, _ := proto.MarshalOptions{Deterministic: true}.Marshal(in.GetSample())
	resp, _ := proto.MarshalOptions{Deterministic: true}.Marshal(out.GetResponse())
	w := &Writer{}
	err := w.AddSessionPair(EncodedInput{Sequence: 12, Sample: sample, ArrivalUnixNs: 99, SessionID: "5f0c2a9e-session", ClientSequence: 300}, resp, nil)
	if err != nil || !bytes.Equal(w.buf, want) {
		t.Errorf("AddSessionPair wrote\n%x (%v)\nwant\n%x", w.buf, err, want)
	}
	w = &Writer{}
	if err := w.AddPair(in, out); err != nil || !bytes.Equal(w.buf, want) {
		t.Errorf("AddPair wrote\n%x (%v)\nwant\n%x", w.buf, err, want)
	}
}
