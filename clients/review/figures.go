package review

import (
	"bytes"
	"fmt"
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

// Colours of the figures (our own palette).
var (
	colFiltered = color.RGBA{R: 31, G: 94, B: 160, A: 255}
	colSmoothed = color.RGBA{R: 214, G: 120, B: 20, A: 255}
	colTruth    = color.RGBA{R: 60, G: 60, B: 60, A: 255}
	colAccepted = color.RGBA{R: 40, G: 150, B: 70, A: 200}
	colRefused  = color.RGBA{R: 200, G: 30, B: 45, A: 255}
	colEllipse  = color.RGBA{R: 31, G: 94, B: 160, A: 110}
	colEllipseS = color.RGBA{R: 214, G: 120, B: 20, A: 110}
	colBand     = color.RGBA{R: 120, G: 120, B: 120, A: 255}
)

// Figure is one rendered figure.
type Figure struct {
	ID, Caption string
	SVG         string
}

func line(p *plot.Plot, xys plotter.XYs, c color.Color, w vg.Length, legend string, dashed bool) {
	if len(xys) < 2 {
		return
	}
	l, err := plotter.NewLine(xys)
	if err != nil {
		return
	}
	l.LineStyle.Color, l.LineStyle.Width = c, w
	if dashed {
		l.LineStyle.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
	}
	p.Add(l)
	if legend != "" {
		p.Legend.Add(legend, l)
	}
}

func scatter(p *plot.Plot, xys plotter.XYs, c color.Color, shape draw.GlyphDrawer, r vg.Length, legend string) {
	if len(xys) == 0 {
		return
	}
	s, err := plotter.NewScatter(xys)
	if err != nil {
		return
	}
	s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = c, shape, r
	p.Add(s)
	if legend != "" {
		p.Legend.Add(legend, s)
	}
}

func render(p *plot.Plot, w, h vg.Length) (string, error) {
	wt, err := p.WriterTo(w, h, "svg")
	if err != nil {
		return "", err
	}
	var buf bytes.Buffer
	if _, err := wt.WriteTo(&buf); err != nil {
		return "", err
	}
	s := buf.String()
	if i := strings.Index(s, "<svg"); i > 0 {
		s = s[i:] // drop the XML prolog: the SVG is inlined in HTML
	}
	return s, nil
}

// ellipse95 returns the 95% position ellipse of a 2x2 covariance as a
// closed polygon (chi-square 2 dof at 0.95 is -2 ln 0.05).
func ellipse95(x, y, a, b, c float64) plotter.XYs {
	tr, det := a+c, a*c-b*b
	disc := math.Sqrt(math.Max(tr*tr/4-det, 0))
	l1, l2 := tr/2+disc, math.Max(tr/2-disc, 0)
	ang := 0.5 * math.Atan2(2*b, a-c)
	k := -2 * math.Log(0.05)
	r1, r2 := math.Sqrt(k*l1), math.Sqrt(k*l2)
	out := make(plotter.XYs, 37)
	sa, ca := math.Sincos(ang)
	for i := range out {
		t := 2 * math.Pi * float64(i) / 36
		u, v := r1*math.Cos(t), r2*math.Sin(t)
		out[i].X, out[i].Y = x+ca*u-sa*v, y+sa*u+ca*v
	}
	return out
}

// Figures draws a run's figures.
func (run *Run) Figures() ([]Figure, error) {
	var figs []Figure
	add := func(id, caption string, p *plot.Plot, w, h vg.Length) error {
		svg, err := render(p, w, h)
		if err != nil {
			return err
		}
		figs = append(figs, Figure{ID: id, Caption: caption, SVG: svg})
		return nil
	}
	// The track.
	p := plot.New()
	p.Title.Text = "Track: filtered and smoothed, with 95% ellipses and fixes"
	p.X.Label.Text, p.Y.Label.Text = "x (m)", "y (m)"
	var filt, smooth, truth plotter.XYs
	for _, pt := range run.Filtered {
		filt = append(filt, plotter.XY{X: pt.State.MeanAt(0), Y: pt.State.MeanAt(1)})
	}
	for _, pt := range run.Smoothed {
		smooth = append(smooth, plotter.XY{X: pt.State.MeanAt(0), Y: pt.State.MeanAt(1)})
	}
	for _, tp := range run.Truth {
		truth = append(truth, plotter.XY{X: tp.X, Y: tp.Y})
	}
	every := max(1, len(run.Filtered)/60)
	for i := 0; i < len(run.Filtered); i += every {
		s := &run.Filtered[i].State
		line(p, ellipse95(s.MeanAt(0), s.MeanAt(1), s.At(0, 0), s.At(0, 1), s.At(1, 1)), colEllipse, vg.Points(0.6), ternary(i == 0, "95% ellipse, filtered", ""), false)
		m := &run.Smoothed[i].State
		line(p, ellipse95(m.MeanAt(0), m.MeanAt(1), m.At(0, 0), m.At(0, 1), m.At(1, 1)), colEllipseS, vg.Points(0.6), ternary(i == 0, "95% ellipse, smoothed", ""), false)
	}
	var acc, ref plotter.XYs
	for _, f := range run.Fixes {
		if math.IsNaN(f.XM) {
			continue
		}
		if f.Verdict == pb.Verdict_VERDICT_APPLIED {
			acc = append(acc, plotter.XY{X: f.XM, Y: f.YM})
		} else {
			ref = append(ref, plotter.XY{X: f.XM, Y: f.YM})
		}
	}
	acc, ref = thin(acc, 3000), thin(ref, 3000)
	scatter(p, acc, colAccepted, draw.CircleGlyph{}, vg.Points(1.2), "fix accepted")
	scatter(p, ref, colRefused, draw.CrossGlyph{}, vg.Points(3), "fix refused")
	line(p, truth, colTruth, vg.Points(0.8), "truth", true)
	line(p, filt, colFiltered, vg.Points(1.2), "filtered", false)
	line(p, smooth, colSmoothed, vg.Points(1.2), "smoothed", false)
	p.Legend.Top = true
	equalAspect(p, append(append(filt, smooth...), acc...), 760, 560)
	if err := add("fig-track", "The track in the field frame. Ellipses hold 95% of the position's probability (filtered in blue, smoothed in orange); dots are accepted fixes, crosses refused ones.", p, vg.Points(760), vg.Points(560)); err != nil {
		return nil, err
	}
	// Standard deviations over time.
	t0 := float64(0)
	if len(run.Filtered) > 0 {
		t0 = float64(run.Filtered[0].StampNs)
	}
	ts := func(ns int64) float64 { return (float64(ns) - t0) * 1e-9 }
	p = plot.New()
	p.Title.Text = "Position standard deviation"
	p.X.Label.Text, p.Y.Label.Text = "time (s)", "m"
	var sx, sy, ssx, ssy, sh, ssh plotter.XYs
	for i, pt := range run.Filtered {
		t := ts(pt.StampNs)
		sx = append(sx, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(0, 0))})
		sy = append(sy, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(1, 1))})
		sh = append(sh, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(2, 2)) * 180 / math.Pi})
		s := &run.Smoothed[i].State
		ssx = append(ssx, plotter.XY{X: t, Y: math.Sqrt(s.At(0, 0))})
		ssy = append(ssy, plotter.XY{X: t, Y: math.Sqrt(s.At(1, 1))})
		ssh = append(ssh, plotter.XY{X: t, Y: math.Sqrt(s.At(2, 2)) * 180 / math.Pi})
	}
	line(p, sx, colFiltered, vg.Points(1), "x filtered", false)
	line(p, sy, colFiltered, vg.Points(1), "y filtered", true)
	line(p, ssx, colSmoothed, vg.Points(1), "x smoothed", false)
	line(p, ssy, colSmoothed, vg.Points(1), "y smoothed", true)
	p.Legend.Top = true
	if err := add("fig-position-std", "Standard deviation of x and y over time, filtered and smoothed.", p, vg.Points(760), vg.Points(300)); err != nil {
		return nil, err
	}
	p = plot.New()
	p.Title.Text = "Heading standard deviation"
	p.X.Label.Text, p.Y.Label.Text = "time (s)", "deg"
	line(p, sh, colFiltered, vg.Points(1), "filtered", false)
	line(p, ssh, colSmoothed, vg.Points(1), "smoothed", false)
	p.Legend.Top = true
	if err := add("fig-heading-std", "Standard deviation of the heading over time.", p, vg.Points(760), vg.Points(260)); err != nil {
		return nil, err
	}
	// NIS per sensor against its band.
	sensors := make([]string, 0, len(run.NIS))
	for k := range run.NIS {
		sensors = append(sensors, k)
	}
	sort.Strings(sensors)
	for _, id := range sensors {
		pts := run.NIS[id]
		p = plot.New()
		p.Title.Text = "NIS of " + id
		p.X.Label.Text, p.Y.Label.Text = "time (s)", "NIS"
		p.Y.Scale = plot.LogScale{}
		p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
		var xy plotter.XYs
		dim := 1
		for _, n := range pts {
			xy = append(xy, plotter.XY{X: ts(n.StampNs), Y: math.Max(n.NIS, 1e-4)})
			dim = max(dim, n.Dim)
		}
		scatter(p, xy, colFiltered, draw.CircleGlyph{}, vg.Points(1), "NIS")
		d := distuv.ChiSquared{K: float64(dim)}
		if len(xy) > 0 {
			lo, hi := d.Quantile(0.025), d.Quantile(0.975)
			x0, x1 := xy[0].X, xy[len(xy)-1].X
			line(p, plotter.XYs{{X: x0, Y: lo}, {X: x1, Y: lo}}, colBand, vg.Points(1), fmt.Sprintf("95%% band, %d dof", dim), true)
			line(p, plotter.XYs{{X: x0, Y: hi}, {X: x1, Y: hi}}, colBand, vg.Points(1), "", true)
		}
		p.Legend.Top = true
		if err := add("fig-nis-"+id, fmt.Sprintf("Normalised innovation squared of %s's accepted and refused inputs, with the two-sided 95%% chi-square band for one of them.", id), p, vg.Points(760), vg.Points(260)); err != nil {
			return nil, err
		}
	}
	// IMU offset.
	if len(run.Filtered) > 0 && run.Filtered[0].State.Size() == 4 {
		p = plot.New()
		p.Title.Text = "IMU offset (the IMU's heading zero in the field frame)"
		p.X.Label.Text, p.Y.Label.Text = "time (s)", "deg"
		var o, os, lo, hi plotter.XYs
		for i, pt := range run.Filtered {
			t := ts(pt.StampNs)
			if pt.State.At(3, 3) > 0.5 {
				continue // not initialised yet
			}
			o = append(o, plotter.XY{X: t, Y: pt.State.MeanAt(3) * 180 / math.Pi})
			s := &run.Smoothed[i].State
			os = append(os, plotter.XY{X: t, Y: s.MeanAt(3) * 180 / math.Pi})
			sd := 2 * math.Sqrt(s.At(3, 3)) * 180 / math.Pi
			lo = append(lo, plotter.XY{X: t, Y: s.MeanAt(3)*180/math.Pi - sd})
			hi = append(hi, plotter.XY{X: t, Y: s.MeanAt(3)*180/math.Pi + sd})
		}
		line(p, o, colFiltered, vg.Points(1), "filtered", false)
		line(p, os, colSmoothed, vg.Points(1), "smoothed", false)
		line(p, lo, colBand, vg.Points(0.6), "smoothed +/- 2 sd", true)
		line(p, hi, colBand, vg.Points(0.6), "", true)
		p.Legend.Top = true
		if err := add("fig-imu-offset", "The estimated IMU offset over time.", p, vg.Points(760), vg.Points(260)); err != nil {
			return nil, err
		}
	}
	return figs, nil
}

func ternary(c bool, a, b string) string {
	if c {
		return a
	}
	return b
}

func thin(xy plotter.XYs, n int) plotter.XYs {
	if len(xy) <= n {
		return xy
	}
	step := (len(xy) + n - 1) / n
	var out plotter.XYs
	for i := 0; i < len(xy); i += step {
		out = append(out, xy[i])
	}
	return out
}

// equalAspect sets the axes so that a metre is as long on both.
func equalAspect(p *plot.Plot, xy plotter.XYs, w, h float64) {
	if len(xy) == 0 {
		return
	}
	xmin, xmax, ymin, ymax := xy[0].X, xy[0].X, xy[0].Y, xy[0].Y
	for _, v := range xy {
		xmin, xmax = math.Min(xmin, v.X), math.Max(xmax, v.X)
		ymin, ymax = math.Min(ymin, v.Y), math.Max(ymax, v.Y)
	}
	dx, dy := math.Max(xmax-xmin, 0.5)*1.1, math.Max(ymax-ymin, 0.5)*1.1
	cx, cy := (xmin+xmax)/2, (ymin+ymax)/2
	if dx/dy > w/h {
		dy = dx * h / w
	} else {
		dx = dy * w / h
	}
	p.X.Min, p.X.Max, p.Y.Min, p.Y.Max = cx-dx/2, cx+dx/2, cy-dy/2, cy+dy/2
}
