package main

import (
	"bytes"
	"context"
	"errors"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"reckon.example/clients/internal/checkctx"
)

// TestReviewInterrupted: review and compare interrupted (Ctrl-C, SIGTERM)
// at any point, from the replay's first input through the drawing of the
// report to the report written and not yet moved into place, stop at their
// next check, exit 130 and leave no output directory: no report posing as
// whole. Before, both ignored the interrupt and ran to the end, writing
// the whole report; later the drawing still ran to its end
// (TestWriteHTMLInterrupted in clients/review).
func TestReviewInterrupted(t *testing.T) {
	commands := map[string]func(context.Context, []string, *bytes.Buffer) error{
		"review": func(ctx context.Context, args []string, out *bytes.Buffer) error {
			return runReview(ctx, args, out, out)
		},
		"compare": func(ctx context.Context, args []string, out *bytes.Buffer) error {
			return runCompare(ctx, append(args, "-b", otherConfig(t)), out, out)
		},
	}
	for name, run := range commands {
		t.Run(name, func(t *testing.T) {
			args := func(out string) []string {
				return []string{"-config", exampleConfig, "-samples", exampleSamples, "-out", out}
			}
			// The whole command, to count its checks.
			whole := checkctx.CancelAfter(math.MaxInt64)
			var out bytes.Buffer
			if err := run(whole, args(filepath.Join(t.TempDir(), "whole")), &out); err != nil {
				t.Fatalf("%v\n%s", err, out.String())
			}
			total := whole.Checks()
			if total < 10 {
				t.Fatalf("%d checks for an interrupt in the whole %s, want one an input at least", total, name)
			}
			// At the first input, halfway through the replay, and at each
			// of the last 30 checks: the smoothed track's runs of 256
			// steps, writeReport's before the report (then one before
			// each figure, one after a run's figures and one before the
			// page is written: 8 for review, 19 for compare), and the last
			// check, once the report is written.
			points := []int64{1, total / 2}
			for n := max(total-30, total/2+1); n <= total; n++ {
				points = append(points, n)
			}
			for _, n := range points {
				ctx := checkctx.CancelAfter(n)
				dir := filepath.Join(t.TempDir(), "out")
				out.Reset()
				err := run(ctx, args(dir), &out)
				if exitCode(err) != exitInterrupted {
					t.Errorf("interrupted at check %d of %d: %v (exit %d), want exit %d", n, total, err, exitCode(err), exitInterrupted)
				}
				// Each loop stops at its next check: the replay's next
				// input, the smoother's or the track's next run of steps;
				// the drawing draws no figure it had not begun, each of
				// which checks once (six in a run's report), then checks
				// once more.
				if after := ctx.Checks() - n; after > 7 {
					t.Errorf("interrupted at check %d of %d: %d checks more before it returned", n, total, after)
				}
				if _, err := os.Stat(dir); !errors.Is(err, fs.ErrNotExist) || strings.Contains(out.String(), "report:") {
					t.Errorf("interrupted at check %d of %d: the output directory is there (%v), or the report named:\n%s", n, total, err, out.String())
				}
			}
		})
	}
}
