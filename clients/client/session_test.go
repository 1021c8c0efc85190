package client_test

import (
	"context"
	"errors"
	"testing"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
)

// TestSendAsRefusesANumberNotGiven: SendAs refuses client sequence 0 and a
// number past Last, sending nothing, as the Python client's send_as does
// (test_resend.py): Send would give that number to another sample later,
// which the service would answer with the first one's verdict and not
// take. Numbers given out by Skip, or up to a resumed session's last, are
// the session's own. Before, SendAs sent any number.
func TestSendAsRefusesANumberNotGiven(t *testing.T) {
	addr, stop := startService()
	defer stop()
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	ctx := context.Background()
	if _, err := c.CreateRobot(ctx, "cart", cartConfig()); err != nil {
		t.Fatal(err)
	}
	step := func(k int64) *pb.Sample { return travel(k*100e6, (k+1)*100e6, 0.1, 0.1) }
	a, err := c.OpenIngest(ctx, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	if resp, err := a.Apply(step(0)); err != nil || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
		t.Fatalf("first sample: %v, %v", resp, err)
	}
	for _, seq := range []uint64{0, 2} {
		if err := a.SendAs(seq, step(1)); !errors.Is(err, client.ErrSequenceNotGiven) {
			t.Errorf("SendAs(%d) with last 1: %v, want ErrSequenceNotGiven", seq, err)
		}
	}
	// Nothing went out: the next sample gets number 2 and is taken as
	// itself, not answered as a repeat of a sample sent under 2 before.
	resp, err := a.Apply(step(1))
	if err != nil || resp.GetClientSequence() != 2 || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED || resp.GetSequence() != 2 {
		t.Fatalf("second sample: %v, %v; want client sequence 2 applied as the robot's input 2", resp, err)
	}
	if err := a.Skip(1); err == nil {
		t.Errorf("Skip(1) with last 2: nil, want an error (numbers given already)")
	}
	if err := a.Skip(4); err != nil {
		t.Fatal(err)
	}
	if err := a.SendAs(4, step(2)); err != nil {
		t.Errorf("SendAs(4) after Skip(4): %v", err)
	} else if resp, err := a.Recv(); err != nil || resp.GetClientSequence() != 4 || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
		t.Errorf("sample sent as 4: %v, %v", resp, err)
	}
	if resp, err := a.Apply(step(3)); err != nil || resp.GetClientSequence() != 5 {
		t.Errorf("Send after Skip(4): %v, %v; want client sequence 5", resp, err)
	}
	if err := a.Close(); err != nil {
		t.Fatal(err)
	}
	// A resumed session's numbers up to its last are its own: the sample
	// sent as 5 before is answered with its first verdict.
	b, err := c.OpenIngest(ctx, "robots/cart", client.Resume(a.ID(), a.Last()))
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if err := b.SendAs(6, step(4)); !errors.Is(err, client.ErrSequenceNotGiven) {
		t.Errorf("SendAs(6) on a session resumed at 5: %v, want ErrSequenceNotGiven", err)
	}
	if err := b.SendAs(5, step(3)); err != nil {
		t.Fatal(err)
	}
	if resp, err := b.Recv(); err != nil || resp.GetClientSequence() != 5 || resp.GetSequence() != 4 {
		t.Errorf("the sample sent as 5 again: %v, %v; want its first verdict (the robot's input 4)", resp, err)
	}
	r, err := c.GetRobot(ctx, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	if got := r.GetInputCount(); got != 4 {
		t.Errorf("the robot took %d inputs, want 4 (each sample once)", got)
	}
}
