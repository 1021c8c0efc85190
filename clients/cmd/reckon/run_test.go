package main

import (
	"context"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"reckon.example/clients/export"
	"reckon.example/server/journal"
)

// The example cart whose controller restarts after five seconds
// (server/convert's TestRebootSamples writes them).
const (
	rebootSamples1 = "../../../testdata/samples/greenhouse-reboot-1.jsonl"
	rebootSamples2 = "../../../testdata/samples/greenhouse-reboot-2.jsonl"
)

// samplesIn counts the samples of a JSON Lines file.
func samplesIn(t *testing.T, path string) int {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, l := range strings.Split(string(b), "\n") {
		if l != "" && l[0] != '#' {
			n++
		}
	}
	return n
}

// TestRunLifecycleCommands: a controller reboot mid-run, as a user sees it
// over a real loopback connection. The restarted clock's samples are
// refused naming the remedy; reckon start-run begins run 2 and the same
// samples are then taken; reckon robots shows the run; a restarted service
// restores it; every acknowledged input is in the journal; review, replay
// and export select each run; deleting the robot and creating it again
// overwrites no record.
func TestRunLifecycleCommands(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	addr, stop := serve(t, "127.0.0.1:0", dir)
	rc := func(args ...string) (string, string, int) {
		t.Helper()
		return runCode(t, ctx, "", append(args, "-addr", addr)...)
	}
	run1, run2 := rebootSamples1, rebootSamples2
	n1, n2 := samplesIn(t, run1), samplesIn(t, run2)
	head := filepath.Join(t.TempDir(), "head.jsonl")
	b, err := os.ReadFile(run2)
	if err != nil {
		t.Fatal(err)
	}
	var first string
	for _, l := range strings.Split(string(b), "\n") {
		if l != "" && l[0] != '#' {
			first = l
			break
		}
	}
	if err := os.WriteFile(head, []byte(first+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	steps := []struct {
		args []string
		code int
		want string // in stdout, or in stderr when the exit code is not 0
	}{
		{[]string{"feed", "-robot", "cart", "-create", exampleConfig, run1}, exitOK, "samples sent to robots/cart: applied"},
		// The restarted controller's first odometry, before anyone said it
		// restarted (only odometry: the new clock's headings and fixes
		// stamped inside the last run's window would look valid to it).
		{[]string{"feed", "-robot", "cart", head}, exitOK, "start a new run"},
		{[]string{"robots"}, exitOK, "robots/cart"},
		{[]string{"start-run", "cart", "-boot-id", "boot-2", "-run", "2"}, exitOK, "robots/cart started run 2 (boot boot-2, input"},
		{[]string{"start-run", "cart", "-boot-id", "boot-2"}, exitRefused, "run_start.boot_id"},
		{[]string{"start-run", "cart", "-run", "1"}, exitRefused, "run 1 is not after the current run 2"},
		{[]string{"start-run", "cart", "-x", "1"}, exitUsage, "a re-seed needs all of -x, -y and -heading"},
		{[]string{"feed", "-robot", "cart", run2}, exitOK, "too_old 0, invalid 0"},
	}
	for _, s := range steps {
		out, errs, code := rc(s.args...)
		text := out
		if s.code != exitOK {
			text = errs
		}
		if code != s.code || !strings.Contains(text, s.want) {
			t.Fatalf("%v: exit %d (want %d), stdout %q, stderr %q; want %q", s.args, code, s.code, out, errs, s.want)
		}
	}
	// The restarted service restores run 2 with every input.
	stop()
	addr, stop = serve(t, "127.0.0.1:0", dir)
	defer stop()
	want := n1 + 1 + n2
	if out, _, code := rc("robots"); code != exitOK || !slices.Equal(robotFields(out)[1:3], []string{"2", strconv.Itoa(want)}) {
		t.Fatalf("robots after the restart: exit %d\n%s", code, out)
	}
	// Every acknowledged input is in the journal, each run's in it.
	byRun := map[uint64]int{}
	if _, _, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true, ReadOnly: true, Input: func(x *journal.Replayed) error {
		byRun[x.Robot.Run()]++
		return nil
	}}); err != nil {
		t.Fatal(err)
	}
	if byRun[1] != n1 || byRun[2] != n2+1 {
		t.Fatalf("journal: inputs by run %v, want %d and %d", byRun, n1, n2+1)
	}

	// Each run reviews on its own, into its own directory.
	work := t.TempDir()
	for _, c := range []struct{ run, inputs, note string }{{"1", strconv.Itoa(n1), "run 1 of the 2 runs"}, {"2", strconv.Itoa(n2), "run 2 of the 2 runs"}} {
		out, errs, code := runCode(t, ctx, "", "review", "-journal", dir, "-robot", "cart", "-run", c.run, "-out", filepath.Join(work, "review-"+c.run))
		if code != exitOK || !strings.Contains(out, c.note) || !strings.Contains(out, c.inputs+" inputs") {
			t.Errorf("review -run %s: exit %d\n%s%s", c.run, code, out, errs)
		}
		// The camera's consistency is the run's own: over as many fixes as
		// the run applied.
		var applied string
		for _, l := range strings.Split(out, "\n") {
			if f := strings.Fields(l); len(f) > 2 && f[0] == "fixes:" && f[1] == "applied" {
				applied = strings.TrimSuffix(f[2], ",")
			}
		}
		if applied == "" || !strings.Contains(out, "over "+applied+" applied") {
			t.Errorf("review -run %s: the camera's NIS is not over the run's %q applied fixes\n%s", c.run, applied, out)
		}
	}
	// Each run's smoothed track is on its own clock, in stamp order: run
	// 2's starts near 0, run 1's ends where run 2's restart was.
	for _, run := range []string{"1", "2"} {
		b, err := os.ReadFile(filepath.Join(work, "review-"+run, "cart-run"+run+"-smoothed.csv"))
		if err != nil {
			t.Fatal(err)
		}
		rows := strings.Split(strings.TrimSpace(string(b)), "\n")[1:]
		var prev int64 = -1
		for _, row := range rows {
			stamp, _ := strconv.ParseInt(row[:strings.IndexByte(row, ',')], 10, 64)
			if stamp <= prev {
				t.Fatalf("run %s: smoothed track goes back from %d to %d", run, prev, stamp)
			}
			prev = stamp
		}
		first, _ := strconv.ParseInt(rows[0][:strings.IndexByte(rows[0], ',')], 10, 64)
		if len(rows) < 100 || run == "2" && first > 100e6 {
			t.Errorf("run %s: %d smoothed rows from %d ns", run, len(rows), first)
		}
	}
	if _, errs, code := runCode(t, ctx, "", "review", "-journal", dir, "-robot", "cart", "-run", "3", "-out", filepath.Join(work, "review-3")); code == exitOK || !strings.Contains(errs, "runs 1 to 2") {
		t.Errorf("review -run 3: exit %d, %s", code, errs)
	}
	// Replay writes one run's samples, its run start first.
	out, errs, code := runCode(t, ctx, "", "replay", "-journal", dir, "-robot", "cart", "-run", "2", "-format", "samples")
	if lines := strings.Split(strings.TrimSpace(out), "\n"); code != exitOK || len(lines) != n2+1 || !strings.Contains(lines[0], `"run_start"`) {
		t.Errorf("replay -run 2: exit %d, %d lines (want %d), first %q; %s", code, len(lines), n2+1, lines[0], errs)
	}

	if _, errs, code := runCode(t, ctx, "", "export", "-journal", dir, "-out", filepath.Join(work, "run2"), "-run", "2"); code != exitOK || !strings.Contains(errs, "exported 1 runs, "+strconv.Itoa(n2+1)+" inputs") {
		t.Errorf("export -run 2: exit %d, %s", code, errs)
	}
	// Deleting the robot and creating it again keeps both runs' records.
	if _, errs, code := rc("delete", "cart"); code != exitOK {
		t.Fatalf("delete: %s", errs)
	}
	if _, errs, code := rc("feed", "-robot", "cart", "-create", exampleConfig, run1); code != exitOK {
		t.Fatalf("feed after delete: %s", errs)
	}
	rows, err := export.Export(ctx, dir, filepath.Join(work, "tables"), export.Options{Deleted: true})
	if err != nil {
		t.Fatal(err)
	}
	var keys []string
	for _, r := range rows {
		keys = append(keys, r.Run+"="+strconv.Itoa(int(r.Inputs)))
	}
	if len(rows) != 3 || rows[0].RunNumber != 1 || rows[1].RunNumber != 2 || rows[1].BootID != "boot-2" || rows[2].Run != "live" ||
		rows[0].Inputs != int64(n1) || rows[1].Inputs != int64(n2+1) || rows[1].Run != rows[0].Journal+"/2" {
		t.Errorf("export: runs %v", keys)
	}
}

// robotFields returns the fields of robots/cart's line in a robots listing.
func robotFields(out string) []string {
	for _, l := range strings.Split(out, "\n") {
		if f := strings.Fields(l); len(f) > 3 && f[0] == "robots/cart" {
			return f
		}
	}
	return nil
}
