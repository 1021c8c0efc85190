package convert

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

// The example samples' cart with its controller restarting after five
// seconds: the first boot's samples, and the second boot's on its
// restarted clock (fusiontest.Reboot), for README's walk through runs.
const (
	rebootSamples1 = "../../testdata/samples/greenhouse-reboot-1.jsonl"
	rebootSamples2 = "../../testdata/samples/greenhouse-reboot-2.jsonl"
)

// TestRebootSamples: the two reboot example files are the simulator's
// (regenerated with -rewrite); under testdata/robots/free-wheel-turn.yaml
// every sample of the first is taken, the second's first odometry is
// refused naming the remedy, and after a run start every sample of the
// second is taken without a refusal.
func TestRebootSamples(t *testing.T) {
	sim := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 3, DurationS: 10, OutlierFraction: 0.05, OdometryHz: 50, IMUHz: 25})
	var ins []fusiontest.Input
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		ins = append(ins, in)
	}
	mid := len(ins) / 2
	const header = "# The simulated greenhouse cart of greenhouse-10s.jsonl (seed 3, free-wheel-turn with IMU) whose\n# controller restarts after its first half: %s.\n# Use with testdata/robots/free-wheel-turn.yaml. Simulated data, for examples only.\n"
	files := []struct {
		path string
		ins  []fusiontest.Input
		what string
	}{
		{rebootSamples1, ins[:mid], "the first boot's samples, before the restart"},
		{rebootSamples2, fusiontest.Reboot(ins, mid), "the second boot's samples, its clock and counts started again"},
	}
	cp, cfg, err := LoadConfigYAML(mustRead(t, "../../testdata/robots/free-wheel-turn.yaml"))
	if err != nil || cp == nil {
		t.Fatal(err)
	}
	r, _ := fusion.New(cfg)
	for k, f := range files {
		var buf bytes.Buffer
		fmt.Fprintf(&buf, header, f.what)
		for i := range f.ins {
			in := &f.ins[i]
			switch {
			case in.Odometry != nil:
				WriteJSONLine(&buf, OdometryToProto(in.Odometry))
			case in.Heading != nil:
				WriteJSONLine(&buf, HeadingToProto(in.Heading))
			default:
				WriteJSONLine(&buf, FixToProto(in.Fix))
			}
		}
		if *rewrite {
			if err := os.WriteFile(f.path, buf.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		got, want := NewSampleReader(bytes.NewReader(mustRead(t, f.path))), NewSampleReader(&buf)
		first := true
		for {
			s, err := got.Next()
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			if w, _ := want.Next(); !proto.Equal(s, w) {
				t.Fatalf("%s:%d differs from the simulator's output; run go test -run TestRebootSamples -rewrite", f.path, got.Line())
			}
			if k == 1 && first {
				resp, taken := Take(r, s, 0)
				if taken || resp.GetRefusal() != pb.Refusal_REFUSAL_TIME_BACKWARDS || !strings.Contains(resp.GetReason(), "start a new run") {
					t.Fatalf("the restarted clock's first odometry: %v", resp)
				}
				if resp, _ := Take(r, &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: "boot-2"}}}, 0); resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
					t.Fatalf("run start: %v", resp)
				}
			}
			first = false
			if resp, taken := Take(r, s, 0); !taken || resp.GetRefusal() != pb.Refusal_REFUSAL_UNSPECIFIED && resp.GetVerdict() != pb.Verdict_VERDICT_GATED {
				t.Fatalf("%s:%d: %v", f.path, got.Line(), resp)
			}
		}
	}
}

func mustRead(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}
