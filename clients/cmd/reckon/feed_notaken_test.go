package main

import (
	"context"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// faultyService runs a service whose journal's file system fails as ffs
// says, its paused robots probing every 50 ms; it returns the address.
func faultyService(t *testing.T, ffs *faultfs.FS) string {
	t.Helper()
	addr, _ := serveWith(t, "127.0.0.1:0", server.Options{JournalDir: t.TempDir(), FS: ffs, ProbeInterval: 50 * time.Millisecond})
	return addr
}

// robotInputs returns how many inputs a robot holds.
func robotInputs(t *testing.T, addr, name string) uint64 {
	t.Helper()
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	r, err := c.GetRobot(context.Background(), name)
	if err != nil {
		t.Fatal(err)
	}
	return r.GetInputCount()
}

// waitServing waits until the robot serves (its paused journal's probe
// found space).
func waitServing(t *testing.T, addr, name string) {
	t.Helper()
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	for deadline := time.Now().Add(10 * time.Second); ; time.Sleep(10 * time.Millisecond) {
		r, err := c.GetRobot(context.Background(), name)
		if err != nil {
			t.Fatal(err)
		}
		if r.GetState() == pb.RobotState_ROBOT_STATE_SERVING {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("robot %s still %v", name, r.GetState())
		}
	}
}

// TestFeedNotTaken: the journal's disk fills in the middle of a feed (every
// journal write from the 4th fails with ENOSPC: the robot pauses). Without
// -wait, feed stops, names the first line not taken and exits 1; fed again
// from that line once space is back, the robot holds every sample once.
// With -wait, feed waits for the robot to serve again and sends the samples
// not taken again itself.
func TestFeedNotTaken(t *testing.T) {
	samples := "../../../testdata/samples/greenhouse-10s.jsonl"
	cfg := "../../../testdata/robots/free-wheel-turn.yaml"
	want := uint64(samplesIn(t, samples))

	t.Run("stop and name the line", func(t *testing.T) {
		ffs := faultfs.New(journal.OS, faultfs.From(faultfs.OpWrite, ".rjl", 3, syscall.ENOSPC))
		addr := faultyService(t, ffs)
		out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", cfg, samples)
		m := regexp.MustCompile(`greenhouse-10s.jsonl:(\d+) and the (\d+) samples after it that were sent were not taken \((.*)\); feed again from there when the robot serves: -from-line (\d+)`).FindStringSubmatch(errs)
		t.Logf("first feed:\n%s%s", out, errs)
		if code != exitFailure || m == nil || m[1] != m[4] || !strings.Contains(m[3], "no space left on device") || !strings.Contains(out, ", not taken ") {
			t.Fatalf("feed exit %d\nstdout:\n%s\nstderr:\n%s", code, out, errs)
		}
		if strings.Contains(out, "invalid: not journaled") || strings.Contains(out, "paused") {
			t.Errorf("samples not taken listed as refused:\n%s", out)
		}
		got := robotInputs(t, addr, "robots/cart")
		if got == 0 || got >= want {
			t.Fatalf("robot holds %d inputs before space returns, want some of %d", got, want)
		}
		ffs.SetInject(nil) // space returns; the robot's probe finds it
		line, _ := strconv.Atoi(m[1])
		waitServing(t, addr, "robots/cart")
		out, errs, code = runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-from-line", strconv.Itoa(line), samples)
		if code != 0 || strings.Contains(out, "not taken") {
			t.Fatalf("feed -from-line %d: exit %d\n%s\n%s", line, code, out, errs)
		}
		if got := robotInputs(t, addr, "robots/cart"); got != want {
			t.Errorf("robot holds %d inputs after the second feed, want %d", got, want)
		}
	})

	t.Run("wait and send again", func(t *testing.T) {
		// Space returns 300 ms after the first write it failed, however
		// long the feed took to get there (a timer from the start let a
		// slow machine's feed finish before the disk filled).
		full := faultfs.From(faultfs.OpWrite, ".rjl", 3, syscall.ENOSPC)
		var once sync.Once
		ffs := faultfs.New(journal.OS, nil)
		ffs.SetInject(func(op faultfs.Op, path string) error {
			err := full(op, path)
			if err != nil {
				once.Do(func() { time.AfterFunc(300*time.Millisecond, func() { ffs.SetInject(nil) }) })
			}
			return err
		})
		addr := faultyService(t, ffs)
		out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", cfg, "-wait", "20s", samples)
		t.Logf("feed -wait:\n%s%s", out, errs)
		if code != 0 || strings.Contains(out, "not taken") || !strings.Contains(errs, "waiting up to 20s for the robot to serve") || !strings.Contains(errs, "the robot serves; sending") {
			t.Fatalf("feed -wait: exit %d\nstdout:\n%s\nstderr:\n%s", code, out, errs)
		}
		if !strings.HasPrefix(out, strconv.Itoa(int(want))+" samples sent to robots/cart: applied ") {
			t.Errorf("feed output:\n%s", out)
		}
		if got := robotInputs(t, addr, "robots/cart"); got != want {
			t.Errorf("robot holds %d inputs, want %d", got, want)
		}
		// The robot equals one fed without a fault.
		clean := faultyService(t, faultfs.New(journal.OS, nil))
		if _, errs, code := runCode(t, context.Background(), "", "feed", "-addr", clean, "-robot", "cart", "-create", cfg, samples); code != 0 {
			t.Fatalf("clean feed: %s", errs)
		}
		got, _, _ := runCode(t, context.Background(), "", "pose", "cart", "-addr", addr, "-format", "jsonl")
		ref, _, _ := runCode(t, context.Background(), "", "pose", "cart", "-addr", clean, "-format", "jsonl")
		if got == "" || got != ref {
			t.Errorf("pose after the resend:\n%s\nwithout the fault:\n%s", got, ref)
		}
	})
}
