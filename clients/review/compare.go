package review

import (
	"context"
	"fmt"
	"html"
	"image/color"
	"math"
	"sort"
	"strings"

	"gonum.org/v1/gonum/stat/distuv"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	pb "reckon.example/proto/reckon/v1"
)

// runColours tell the runs of a comparison apart.
var runColours = []color.RGBA{colFiltered, colSmoothed, colSecond, {R: 40, G: 150, B: 70, A: 255}}

func runColour(i int) color.RGBA { return runColours[i%len(runColours)] }

func cssOf(c color.RGBA) string { return fmt.Sprintf("#%02x%02x%02x", c.R, c.G, c.B) }

// compareHTML writes the comparison of runs of one recording: a table of
// their differences and their tracks, deviations and NIS overlaid.
func compareHTML(ctx context.Context, b *strings.Builder, runs []*Run) error {
	b.WriteString("<h2>Differences</h2>\n<table class=\"differences\"><tr><th></th>")
	for i, run := range runs {
		fmt.Fprintf(b, "<th style=\"color:%s\">%s</th>", cssOf(runColour(i)), html.EscapeString(run.Label))
	}
	if len(runs) == 2 {
		b.WriteString("<th>second minus first</th>")
	}
	b.WriteString("</tr>\n")
	for _, row := range differences(runs) {
		b.WriteString("<tr><td>" + html.EscapeString(row.name) + "</td>")
		for _, v := range row.values {
			b.WriteString("<td>" + html.EscapeString(row.format(v)) + "</td>")
		}
		if len(runs) == 2 {
			d := row.values[1] - row.values[0]
			if math.IsNaN(d) {
				b.WriteString("<td></td>")
			} else {
				b.WriteString("<td>" + html.EscapeString(signed(row.format(d), d)) + "</td>")
			}
		}
		b.WriteString("</tr>\n")
	}
	b.WriteString("</table>\n<h2>Problems found</h2>\n")
	for _, run := range runs {
		b.WriteString("<h3>" + html.EscapeString(run.Label) + "</h3>\n")
		problemsHTML(b, run)
	}
	b.WriteString("<h2>Overlaid</h2>\n")
	figs, err := compareFigures(ctx, runs)
	if err != nil {
		return err
	}
	for _, f := range figs {
		figureHTML(b, f.ID, f)
	}
	return nil
}

func signed(s string, v float64) string {
	if v > 0 {
		return "+" + s
	}
	return s
}

// difference is a row of the comparison's table.
type difference struct {
	name   string
	values []float64
	format func(float64) string
}

// differences returns the rows of the comparison's table: errors against
// truth when the runs have it, refused fixes and the time trusted.
func differences(runs []*Run) []difference {
	row := func(name, unit string, prec int, f func(*Summary) float64) difference {
		d := difference{name: name, format: func(v float64) string {
			if math.IsNaN(v) {
				return "-"
			}
			return strings.TrimSpace(fmt.Sprintf("%.*f %s", prec, v, unit))
		}}
		for _, r := range runs {
			d.values = append(d.values, f(&r.Summary))
		}
		return d
	}
	truth := func(f func(*Summary) float64) func(*Summary) float64 {
		return func(s *Summary) float64 {
			if !s.HasTruth {
				return math.NaN()
			}
			return f(s)
		}
	}
	rows := []difference{
		row("RMS position error, filtered", "m", 4, truth(func(s *Summary) float64 { return s.FilteredRMSM })),
		row("RMS position error, smoothed", "m", 4, truth(func(s *Summary) float64 { return s.SmoothedRMSM })),
		// 3 for a consistent pose covariance (chi-square with 3 dof, common practice).
		row("mean NEES with truth, filtered (3 if consistent)", "", 2, truth(func(s *Summary) float64 { return s.FilteredNEES })),
		row("mean NEES with truth, smoothed", "", 2, truth(func(s *Summary) float64 { return s.SmoothedNEES })),
		row("fixes refused", "", 0, func(s *Summary) float64 { return float64(s.refusedFixes()) }),
		row("time trusted", "s", 1, func(s *Summary) float64 { return secs(s.EndNs - s.StartNs - s.untrustedNs()) }),
		row("time not trusted", "s", 1, func(s *Summary) float64 { return secs(s.untrustedNs()) }),
		row("largest 95% position radius", "m", 3, func(s *Summary) float64 {
			if s.Estimates == 0 {
				// A run without odometry has no estimate: 0 would read as a
				// pose known exactly (the review's summary says none).
				return math.NaN()
			}
			return s.Max95M
		}),
		row("slips suspected", "", 0, func(s *Summary) float64 { return float64(s.Slips) }),
	}
	return rows
}

// compareFigures overlays the runs: their tracks, position deviations and
// the NIS of each sensor, on shared axes. It stops with ctx's error once
// ctx is done, before the next figure.
func compareFigures(ctx context.Context, runs []*Run) ([]Figure, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	first := runs[0]
	var figs []Figure
	// The tracks.
	p := plot.New()
	p.Title.Text = "Tracks overlaid (filtered)"
	p.X.Label.Text, p.Y.Label.Text = "x (m)", "y (m)"
	var all plotter.XYs
	tracks := make([]plotter.XYs, len(runs))
	for i, run := range runs {
		for _, pt := range run.Filtered {
			tracks[i] = append(tracks[i], plotter.XY{X: pt.State.MeanAt(0), Y: pt.State.MeanAt(1)})
		}
		all = append(all, tracks[i]...)
	}
	var truth plotter.XYs
	for _, tp := range first.Truth {
		if !math.IsNaN(tp.X) {
			truth = append(truth, plotter.XY{X: tp.X, Y: tp.Y})
		}
	}
	all = append(all, truth...)
	xmin, xmax, ymin, ymax := trackAxes(all)
	equalAspect(p, plotter.XYs{{X: xmin, Y: ymin}, {X: xmax, Y: ymax}}, 760, 560)
	line(p, truth, colTruth, vg.Points(0.9), "truth", true)
	for i, run := range runs {
		line(p, tracks[i], runColour(i), vg.Points(1.3), run.Label, false)
		var ref plotter.XYs
		for _, f := range run.Fixes {
			if !math.IsNaN(f.XM) && f.Verdict != pb.Verdict_VERDICT_APPLIED && f.Verdict != pb.Verdict_VERDICT_HELD {
				ref = append(ref, plotter.XY{X: f.XM, Y: f.YM})
			}
		}
		scatter(p, thin(ref, 2000), runColour(i), draw.CrossGlyph{}, vg.Points(2.5), "fix refused, "+run.Label)
	}
	p.Legend.Top = true
	svg, _, err := render(p, vg.Points(760), vg.Points(560), "clip-cmp-track", func(o *overlay) {
		for i, run := range runs {
			c := cssOf(runColour(i))
			for _, d := range run.Summary.Distrust {
				a, b := nearest(run.Filtered, d.FromNs), nearest(run.Filtered, d.ToNs)
				if len(run.Filtered) == 0 {
					break
				}
				o.add(`<path class="interval distrust run-%d" data-t="%.2f" d="%s" fill="none" stroke="%s" stroke-opacity="0.35" stroke-width="7"><title>%s: not to be trusted, %.2f to %.2f s</title></path>`,
					i, run.ts(d.FromNs), o.path(tracks[i][a:b+1], false), c, html.EscapeString(run.Label), run.ts(d.FromNs), run.ts(d.ToNs))
			}
		}
	})
	if err != nil {
		return nil, err
	}
	figs = append(figs, Figure{ID: "cmp-track", SVG: svg, Caption: "The runs' filtered tracks on the same axes, with the truth where there is one; crosses are each run's refused fixes, wide strokes its stretches not to be trusted."})
	// Position deviations: the 95% radius, and the error against truth.
	p = plot.New()
	p.Title.Text = "Position deviation"
	p.Y.Label.Text = "m"
	for i, run := range runs {
		var r95, errs plotter.XYs
		for k, pt := range run.Filtered {
			t := run.ts(pt.StampNs)
			r95 = append(r95, plotter.XY{X: t, Y: pt.State.Position95()})
			if k < len(run.Truth) && !math.IsNaN(run.Truth[k].X) {
				errs = append(errs, plotter.XY{X: t, Y: math.Hypot(pt.State.MeanAt(0)-run.Truth[k].X, pt.State.MeanAt(1)-run.Truth[k].Y)})
			}
		}
		line(p, r95, runColour(i), vg.Points(1), "95% radius, "+run.Label, true)
		line(p, errs, runColour(i), vg.Points(1), "error against truth, "+run.Label, false)
	}
	p.Legend.Top = true
	f, err := compareTime(ctx, runs, "cmp-deviation", "The 95% position radius (dashed) and, with truth, the position error (solid) of each run; shaded: each run's stretches not to be trusted.", p, vg.Points(300), nil)
	if err != nil {
		return nil, err
	}
	figs = append(figs, f)
	// NIS of each sensor.
	sensors := map[string]bool{}
	for _, run := range runs {
		for id := range run.NIS {
			sensors[id] = true
		}
	}
	ids := make([]string, 0, len(sensors))
	for id := range sensors {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		p = plot.New()
		p.Title.Text = "NIS of " + id
		p.Y.Label.Text = "NIS"
		p.Y.Scale = plot.LogScale{}
		p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
		lo, hi := math.Inf(1), math.Inf(-1)
		dim := 1
		for i, run := range runs {
			var acc, ref plotter.XYs
			for _, n := range run.NIS[id] {
				q := plotter.XY{X: run.ts(n.StampNs), Y: math.Max(n.NIS, 1e-4)}
				if n.Refused {
					ref = append(ref, q)
				} else {
					acc = append(acc, q)
				}
				lo, hi, dim = math.Min(lo, q.Y), math.Max(hi, q.Y), max(dim, n.Dim)
			}
			scatter(p, acc, runColour(i), draw.CircleGlyph{}, vg.Points(1), "accepted, "+run.Label)
			scatter(p, ref, runColour(i), draw.CrossGlyph{}, vg.Points(3), "refused, "+run.Label)
		}
		if math.IsInf(lo, 1) {
			continue
		}
		d := distuv.ChiSquared{K: float64(dim)}
		var gates []float64
		for _, run := range runs {
			g := math.NaN()
			if run.gated(id) && run.Config.GateProbability > 0 && run.Config.GateProbability < 1 {
				g = d.Quantile(run.Config.GateProbability)
				hi = math.Max(hi, g*1.5)
			}
			gates = append(gates, g)
		}
		p.Y.Min, p.Y.Max = lo/1.5, hi*1.5
		p.Legend.Top = true
		f, err := compareTime(ctx, runs, "cmp-nis-"+id, "NIS of "+id+" in each run: dots accepted, crosses refused; lines are each run's gate.", p, vg.Points(280), func(o *overlay) {
			x0, _, x1, _ := o.box()
			for i, g := range gates {
				if math.IsNaN(g) {
					continue
				}
				_, y := o.xy(0, g)
				o.add(`<line class="gate-line run-%d" x1="%.1f" x2="%.1f" y1="%.1f" y2="%.1f" stroke="%s" stroke-width="1.5" stroke-dasharray="6 3"><title>%s: gate at NIS %.2f</title></line>`, i, x0, x1, y, y, cssOf(runColour(i)), html.EscapeString(runs[i].Label), g)
			}
		})
		if err != nil {
			return nil, err
		}
		figs = append(figs, f)
	}
	return figs, nil
}

// compareTime renders a time figure of a comparison, with each run's
// stretches not to be trusted shaded in its colour.
func compareTime(ctx context.Context, runs []*Run, id, caption string, p *plot.Plot, h vg.Length, extra func(o *overlay)) (Figure, error) {
	if err := ctx.Err(); err != nil {
		return Figure{}, err
	}
	first := runs[0]
	f, err := first.timeFigureWith(id, caption, p, h, func(o *overlay) {
		_, y0, _, y1 := o.box()
		for i, run := range runs {
			for _, d := range run.Summary.Distrust {
				a, b := o.x(run.ts(d.FromNs)), o.x(run.ts(d.ToNs))
				o.add(`<rect class="interval distrust run-%d" data-t="%.2f" x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="%s" fill-opacity="0.14"><title>%s: not to be trusted, %.2f to %.2f s</title></rect>`,
					i, run.ts(d.FromNs), a, y0, math.Max(b-a, 2), y1-y0, cssOf(runColour(i)), html.EscapeString(run.Label), run.ts(d.FromNs), run.ts(d.ToNs))
			}
		}
		if extra != nil {
			extra(o)
		}
	})
	return f, err
}
