package review

import (
	"bytes"
	"context"
	"errors"
	"io"
	"testing"

	"reckon.example/clients/internal/checkctx"
	"reckon.example/fusion/fusiontest"
)

// TestWriteHTMLInterrupted: drawing a report (one run, a comparison, a
// calibration), interrupted at any of its checks (one before each figure,
// one after a run's figures, one before the page is written), returns the
// context's error, begins no figure after it and writes nothing: no part
// of a report. Before, the drawing ignored the context and wrote the whole
// report, however early the interrupt came.
func TestWriteHTMLInterrupted(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 72, DurationS: 10, OutlierFraction: 0.05})
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	draws := map[string]func(ctx context.Context, w io.Writer) error{
		"review": func(ctx context.Context, w io.Writer) error { return WriteHTMLContext(ctx, w, "cart", run) },
		"compare": func(ctx context.Context, w io.Writer) error {
			return WriteHTMLContext(ctx, w, "cart and cart", run, run)
		},
		"calibration": func(ctx context.Context, w io.Writer) error {
			return WriteCalibrationHTMLContext(ctx, w, "cart", Calibration{By: "reckon calibrate"}, run, run)
		},
	}
	for name, draw := range draws {
		t.Run(name, func(t *testing.T) {
			// Interrupted before it begins: nothing drawn, nothing written.
			var b bytes.Buffer
			done, cancel := context.WithCancel(context.Background())
			cancel()
			if err := draw(done, &b); !errors.Is(err, context.Canceled) || b.Len() > 0 {
				t.Fatalf("interrupted before it began: %v, %d bytes written; want context.Canceled and nothing", err, b.Len())
			}
			whole := checkctx.CancelAfter(-1)
			if err := draw(whole, &b); err != nil || b.Len() == 0 {
				t.Fatalf("the whole report: %v, %d bytes", err, b.Len())
			}
			total := whole.Checks()
			// Each figure is a check: six for one run, more for two.
			if total < 6 {
				t.Fatalf("%d checks for an interrupt in the whole report, want one a figure at least", total)
			}
			for n := int64(1); n <= total; n++ {
				ctx := checkctx.CancelAfter(n)
				b.Reset()
				err := draw(ctx, &b)
				if !errors.Is(err, context.Canceled) || b.Len() > 0 {
					t.Errorf("interrupted at check %d of %d: %v, %d bytes written; want context.Canceled and nothing", n, total, err, b.Len())
				}
				// A figure not begun checks once and is skipped; one begun
				// is finished (tens of milliseconds); then the figures'
				// end checks once more.
				if after := ctx.Checks() - n; after > 7 {
					t.Errorf("interrupted at check %d of %d: %d checks more before it returned", n, total, after)
				}
			}
		})
	}
}
