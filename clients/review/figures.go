package review

import (
	"bytes"
	"context"
	"fmt"
	"html"
	"image/color"
	"math"
	"sort"
	"strings"
	"sync"

	"gonum.org/v1/gonum/stat/distuv"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	pb "reckon.example/proto/reckon/v1"
)

// Colours of the figures (our own palette), and their CSS forms for the
// marks drawn over them. Translucent ones are color.NRGBA: color.RGBA is
// alpha-premultiplied, and a component above its alpha comes out as
// nonsense (the old legend's blank swatches).
var (
	colFiltered = color.RGBA{R: 31, G: 94, B: 160, A: 255}
	colSmoothed = color.RGBA{R: 214, G: 120, B: 20, A: 255}
	colTruth    = color.RGBA{R: 60, G: 60, B: 60, A: 255}
	colAccepted = color.NRGBA{R: 40, G: 150, B: 70, A: 200}
	colRefused  = color.RGBA{R: 200, G: 30, B: 45, A: 255}
	colBand     = color.RGBA{R: 120, G: 120, B: 120, A: 255}
	colDistrust = color.NRGBA{R: 200, G: 30, B: 45, A: 90}
	colEllipseF = color.NRGBA{R: 31, G: 94, B: 160, A: 50}
	colEllipseS = color.NRGBA{R: 214, G: 120, B: 20, A: 50}
	colSecond   = color.RGBA{R: 120, G: 60, B: 170, A: 255}
)

const (
	cssFiltered = "#1f5ea0"
	cssSmoothed = "#d67814"
	cssRefused  = "#c81e2d"
	cssDistrust = "#c81e2d"
	cssStretch  = "#e08a00"
	cssGap      = "#777777"
	cssEvent    = "#6a3d9a"
)

// Figure is one rendered figure.
type Figure struct {
	ID, Caption string
	SVG         string
	// Time is set for figures whose x axis is time: TMinS and TMaxS (s
	// from the run's start) are drawn at SVG x coordinates X0 and X1, so
	// that the page's script can zoom them to a moment.
	Time         bool
	TMinS, TMaxS float64
	X0, X1       float64
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

// legendLine adds a legend entry for marks drawn over the figure.
func legendLine(p *plot.Plot, name string, c color.Color, w vg.Length, dashed bool) {
	l := &plotter.Line{XYs: plotter.XYs{{}, {X: 1}}}
	l.LineStyle.Color, l.LineStyle.Width = c, w
	if dashed {
		l.LineStyle.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
	}
	p.Legend.Add(name, l)
}

// legendArea adds a legend entry with a filled swatch.
func legendArea(p *plot.Plot, name string, fill, edge color.Color) {
	pg, err := plotter.NewPolygon(plotter.XYs{{}, {X: 1}, {X: 1, Y: 1}})
	if err != nil {
		return
	}
	pg.Color = fill
	pg.LineStyle.Color, pg.LineStyle.Width = edge, vg.Points(1)
	p.Legend.Add(name, pg)
}

// probe is a plotter that draws nothing and remembers where the data went,
// so that marks can be drawn over the rendered figure.
type probe struct {
	c      draw.Canvas
	tx, ty func(float64) vg.Length
}

func (pr *probe) Plot(c draw.Canvas, p *plot.Plot) {
	pr.c = c
	pr.tx, pr.ty = p.Transforms(&c)
}

// overlay gathers SVG elements drawn over a figure: in the SVG's own
// coordinates (points, origin at the top left), with classes the page's
// script and its tests can find.
type overlay struct {
	pr      *probe
	h       float64
	clipped strings.Builder // clipped to the data area
	edge    strings.Builder // drawn as they are (marks at the edge)
}

func (o *overlay) xy(x, y float64) (float64, float64) {
	return float64(o.pr.tx(x)), o.h - float64(o.pr.ty(y))
}

func (o *overlay) x(v float64) float64 { return float64(o.pr.tx(v)) }

// box returns the data area: left, top, right, bottom.
func (o *overlay) box() (x0, y0, x1, y1 float64) {
	c := o.pr.c
	return float64(c.Min.X), o.h - float64(c.Max.Y), float64(c.Max.X), o.h - float64(c.Min.Y)
}

func (o *overlay) add(format string, args ...any) { fmt.Fprintf(&o.clipped, format, args...) }

// path returns the SVG path of the data points given.
func (o *overlay) path(xys plotter.XYs, closed bool) string {
	var b strings.Builder
	for i, p := range xys {
		x, y := o.xy(p.X, p.Y)
		if i == 0 {
			fmt.Fprintf(&b, "M%.1f %.1f", x, y)
		} else {
			fmt.Fprintf(&b, "L%.1f %.1f", x, y)
		}
	}
	if closed {
		b.WriteString("Z")
	}
	return b.String()
}

// render draws the plot as SVG, with the marks drawn over it; clip names
// the figure's clip path, unique in the page.
func render(p *plot.Plot, w, h vg.Length, clip string, marks func(o *overlay)) (string, *overlay, error) {
	pr := &probe{}
	p.Add(pr)
	c := vgsvg.New(w, h)
	p.Draw(draw.New(c))
	o := &overlay{pr: pr, h: h.Points()}
	if marks != nil && pr.tx != nil {
		marks(o)
	}
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return "", nil, err
	}
	s := buf.String()
	if i := strings.Index(s, "<svg"); i > 0 {
		s = s[i:] // drop the XML prolog: the SVG is inlined in HTML
	}
	if i := strings.LastIndex(s, "</svg>"); i > 0 && pr.tx != nil {
		x0, y0, x1, y1 := o.box()
		marksSVG := fmt.Sprintf(`<defs><clipPath id="%s"><rect x="%.1f" y="%.1f" width="%.1f" height="%.1f"/></clipPath></defs><g class="marks" clip-path="url(#%s)">%s</g><g class="marks-edge">%s</g>`,
			clip, x0, y0, x1-x0, y1-y0, clip, o.clipped.String(), o.edge.String())
		s = s[:i] + marksSVG + s[i:]
	}
	return s, o, nil
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

// startNs is the stamp the time axes count from: the run's first input.
func (run *Run) startNs() int64 {
	if run.Summary.RunStartNs != 0 {
		return run.Summary.RunStartNs
	}
	return run.Summary.StartNs
}

// ts converts a stamp to seconds on the time axes.
func (run *Run) ts(ns int64) float64 { return float64(ns-run.startNs()) * 1e-9 }

// clipID returns a clip path id for figure id of the run, unique in a page
// of several runs.
//
// The two parts are joined by "__", which neither holds (idPart writes an
// underscore only before six hex digits): joined by a hyphen, which idPart
// keeps, sensor "a" in run "b-x" and sensor "a-b" in run "x" shared one id.
func (run *Run) clipID(id string) string { return "clip-" + id + "__" + idPart(run.Label) }

// idPart writes s, a name the user chose (a sensor's id, a run's label),
// as part of an element id: ASCII letters, digits and hyphens stay, every
// other rune becomes an underscore and its code point in six hex digits.
// The result holds no space, quote or angle bracket, so that it can stand
// in an attribute unescaped and in url(#...), and two names never share
// it (the encoding is one to one), so that ids stay unique in a page.
func idPart(s string) string {
	var b strings.Builder
	for _, r := range s {
		if r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-' {
			b.WriteRune(r)
		} else {
			fmt.Fprintf(&b, "_%06x", r)
		}
	}
	return b.String()
}

// timeFigure renders a plot over time with the run's intervals and events
// shaded, on the common time axis.
func (run *Run) timeFigure(id, caption string, p *plot.Plot, h vg.Length, extra func(o *overlay)) (Figure, error) {
	return run.timeFigureWith(id, caption, p, h, func(o *overlay) {
		run.shadeTime(o)
		if extra != nil {
			extra(o)
		}
	})
}

// timeFigureWith renders a plot over time with the marks given.
func (run *Run) timeFigureWith(id, caption string, p *plot.Plot, h vg.Length, marks func(o *overlay)) (Figure, error) {
	p.X.Min, p.X.Max = run.ts(run.Summary.StartNs), run.ts(run.Summary.EndNs)
	if p.X.Max <= p.X.Min {
		p.X.Max = p.X.Min + 1
	}
	p.X.Label.Text = "time (s from the run's start)"
	svg, o, err := render(p, vg.Points(760), h, run.clipID(id), marks)
	if err != nil {
		return Figure{}, err
	}
	return Figure{ID: id, Caption: caption, SVG: svg, Time: true, TMinS: p.X.Min, TMaxS: p.X.Max, X0: o.x(p.X.Min), X1: o.x(p.X.Max)}, nil
}

// shadeTime shades the do-not-trust intervals, refused stretches and gaps
// of a time figure, and draws a line at each recovery and slip.
func (run *Run) shadeTime(o *overlay) {
	_, y0, _, y1 := o.box()
	s := &run.Summary
	rect := func(iv Interval, class, colour string) {
		a, b := o.x(run.ts(iv.FromNs)), o.x(run.ts(iv.ToNs))
		if b-a < 2 {
			a, b = (a+b)/2-1, (a+b)/2+1
		}
		o.add(`<rect class="interval %s" data-t="%.2f" x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="%s" fill-opacity="0.16"><title>%.2f to %.2f s: %s</title></rect>`,
			class, run.ts(iv.FromNs), a, y0, b-a, y1-y0, colour, run.ts(iv.FromNs), run.ts(iv.ToNs), html.EscapeString(iv.Detail))
	}
	for _, iv := range s.Distrust {
		rect(iv, "distrust", cssDistrust)
	}
	for _, iv := range s.RefusedStretches {
		rect(iv, "refused", cssStretch)
	}
	for _, iv := range s.InputGaps {
		rect(iv, "gap", cssGap)
	}
	vline := func(ns int64, class, title string) {
		x := o.x(run.ts(ns))
		o.add(`<line class="event %s" x1="%.1f" x2="%.1f" y1="%.1f" y2="%.1f" stroke="%s" stroke-width="1" stroke-dasharray="3 2"><title>%.2f s: %s</title></line>`,
			class, x, x, y0, y1, cssEvent, run.ts(ns), html.EscapeString(title))
	}
	s.eachEvent(vline)
}

// maxSlipMarks is how many suspected slips a figure marks at most.
const maxSlipMarks = 300

// eachEvent calls mark, with the class and title the figures give them,
// for every move by hand and the first maxSlipMarks suspected slips.
func (s *Summary) eachEvent(mark func(ns int64, class, title string)) {
	for _, r := range s.Recoveries {
		mark(r.FromNs, "recovery", "moved by hand: "+r.Detail)
	}
	for _, ns := range s.SlipsAt[:min(len(s.SlipsAt), maxSlipMarks)] {
		mark(ns, "slip", "wheel slip suspected")
	}
}

// trackAxes returns axes for the track that hold the bulk of the points:
// the 0.5th to 99.5th percentile of each coordinate with a margin of a
// quarter of that extent (and half a metre), so that a few far outliers
// do not shrink the track.
func trackAxes(pts plotter.XYs) (xmin, xmax, ymin, ymax float64) {
	if len(pts) == 0 {
		return -1, 1, -1, 1
	}
	xs, ys := make([]float64, len(pts)), make([]float64, len(pts))
	for i, p := range pts {
		xs[i], ys[i] = p.X, p.Y
	}
	sort.Float64s(xs)
	sort.Float64s(ys)
	pct := func(v []float64, q float64) float64 { return v[int(math.Round(q*float64(len(v)-1)))] }
	xmin, xmax, ymin, ymax = pct(xs, 0.005), pct(xs, 0.995), pct(ys, 0.005), pct(ys, 0.995)
	mx, my := 0.25*(xmax-xmin)+0.5, 0.25*(ymax-ymin)+0.5
	return xmin - mx, xmax + mx, ymin - my, ymax + my
}

// tickEvery returns the spacing of the time marks along the track (s):
// the shortest of a few round spacings that gives at most 30 marks.
func tickEvery(durationS float64) float64 {
	for _, s := range []float64{1, 2, 5, 10, 20, 30, 60, 120, 300, 600, 1200, 1800, 3600} {
		if durationS/s <= 30 {
			return s
		}
	}
	return 7200
}

// nearest returns the index of the point of pts nearest in time to ns.
func nearest(pts []Point, ns int64) int {
	i := sort.Search(len(pts), func(i int) bool { return pts[i].StampNs >= ns })
	if i == len(pts) || i > 0 && ns-pts[i-1].StampNs < pts[i].StampNs-ns {
		i--
	}
	return i
}

// trackFigure draws the track: the filtered and smoothed estimates, the
// truth, fixes, 95% ellipses, time marks, and the intervals and events.
func (run *Run) trackFigure() (Figure, error) {
	p := plot.New()
	p.Title.Text = "Track: filtered and smoothed, with 95% ellipses, fixes and time marks"
	p.X.Label.Text, p.Y.Label.Text = "x (m)", "y (m)"
	var filt, smooth, truth, acc, ref plotter.XYs
	for _, pt := range run.Filtered {
		filt = append(filt, plotter.XY{X: pt.State.MeanAt(0), Y: pt.State.MeanAt(1)})
	}
	for _, pt := range run.Smoothed {
		smooth = append(smooth, plotter.XY{X: pt.State.MeanAt(0), Y: pt.State.MeanAt(1)})
	}
	for _, tp := range run.Truth {
		if !math.IsNaN(tp.X) {
			truth = append(truth, plotter.XY{X: tp.X, Y: tp.Y})
		}
	}
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
	// The axes hold the filtered track, the truth and the fixes; the
	// smoothed track, which can swing far where the filtered one was
	// lost, is clipped where it leaves them.
	var all plotter.XYs
	for _, s := range []plotter.XYs{filt, truth, acc, ref} {
		all = append(all, s...)
	}
	const w, h = 760, 560
	xmin, xmax, ymin, ymax := trackAxes(all)
	equalAspect(p, plotter.XYs{{X: xmin, Y: ymin}, {X: xmax, Y: ymax}}, w, h)
	inside := func(q plotter.XY) bool { return q.X >= p.X.Min && q.X <= p.X.Max && q.Y >= p.Y.Min && q.Y <= p.Y.Max }
	keep := func(s plotter.XYs) (in, out plotter.XYs) {
		for _, q := range s {
			if inside(q) {
				in = append(in, q)
			} else {
				out = append(out, q)
			}
		}
		return in, out
	}
	accIn, accOut := keep(acc)
	refIn, refOut := keep(ref)
	scatter(p, thin(accIn, 3000), colAccepted, draw.CircleGlyph{}, vg.Points(1.3), "fix accepted")
	scatter(p, thin(refIn, 3000), colRefused, draw.CrossGlyph{}, vg.Points(3), "fix refused")
	line(p, truth, colTruth, vg.Points(0.9), "truth", true)
	line(p, filt, colFiltered, vg.Points(1.2), "filtered", false)
	line(p, smooth, colSmoothed, vg.Points(1.2), "smoothed", false)
	legendArea(p, "95% ellipse, filtered", colEllipseF, colFiltered)
	legendArea(p, "95% ellipse, smoothed", colEllipseS, colSmoothed)
	if len(run.Summary.Distrust) > 0 {
		legendLine(p, "do not trust", colDistrust, vg.Points(5), false)
	}
	p.Legend.Top = true
	svg, _, err := render(p, vg.Points(w), vg.Points(h), run.clipID("fig-track"), func(o *overlay) {
		run.trackMarks(o, filt)
		outliers(o, accOut, "fix accepted", cssFiltered)
		outliers(o, refOut, "fix refused", cssRefused)
	})
	if err != nil {
		return Figure{}, err
	}
	return Figure{ID: "fig-track", SVG: svg,
		Caption: "The track in the field frame. Ellipses hold 95% of the position's probability (filtered in blue, smoothed in orange); dots are accepted fixes, crosses refused ones; " +
			"marks across the track give the time in seconds; red stretches are not to be trusted, orange ones had fixes refused in a row, grey dashes are gaps, rings are moves and slips. " +
			"Points far outside are drawn as triangles at the edge. Scroll to zoom, drag to pan, double-click to reset."}, nil
}

// trackMarks draws the ellipses, time marks, intervals and events on the
// track.
func (run *Run) trackMarks(o *overlay, filt plotter.XYs) {
	n := len(run.Filtered)
	if n == 0 {
		return
	}
	// About 40 ellipses of each kind, evenly in time.
	every := max(1, n/40)
	for i := 0; i < n; i += every {
		for _, e := range []struct {
			s      *Point
			class  string
			colour string
		}{{&run.Filtered[i], "filtered", cssFiltered}, {&run.Smoothed[i], "smoothed", cssSmoothed}} {
			st := &e.s.State
			xy := ellipse95(st.MeanAt(0), st.MeanAt(1), st.At(0, 0), st.At(0, 1), st.At(1, 1))
			o.add(`<path class="ellipse %s" data-t="%.2f" d="%s" fill="%s" fill-opacity="0.12" stroke="%s" stroke-width="1"/>`, e.class, run.ts(e.s.StampNs), o.path(xy, true), e.colour, e.colour)
		}
	}
	s := &run.Summary
	stretch := func(iv Interval, class, colour string, width float64) {
		a, b := nearest(run.Filtered, iv.FromNs), nearest(run.Filtered, iv.ToNs)
		seg := filt[a : b+1]
		if len(seg) == 1 {
			x, y := o.xy(seg[0].X, seg[0].Y)
			o.add(`<circle class="interval %s" data-t="%.2f" cx="%.1f" cy="%.1f" r="%.1f" fill="%s" fill-opacity="0.45"><title>%s</title></circle>`, class, run.ts(iv.FromNs), x, y, width, colour, html.EscapeString(iv.Detail))
			return
		}
		o.add(`<path class="interval %s" data-t="%.2f" d="%s" fill="none" stroke="%s" stroke-opacity="0.4" stroke-width="%.0f" stroke-linecap="round"><title>%.2f to %.2f s: %s</title></path>`,
			class, run.ts(iv.FromNs), o.path(seg, false), colour, width, run.ts(iv.FromNs), run.ts(iv.ToNs), html.EscapeString(iv.Detail))
	}
	for _, iv := range s.Distrust {
		stretch(iv, "distrust", cssDistrust, 7)
	}
	for _, iv := range s.RefusedStretches {
		stretch(iv, "refused", cssStretch, 5)
	}
	for _, iv := range s.InputGaps {
		a, b := filt[nearest(run.Filtered, iv.FromNs)], filt[nearest(run.Filtered, iv.ToNs)]
		x0, y0 := o.xy(a.X, a.Y)
		x1, y1 := o.xy(b.X, b.Y)
		o.add(`<line class="interval gap" data-t="%.2f" x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="%s" stroke-width="3" stroke-dasharray="4 3"><title>%s</title></line>`, run.ts(iv.FromNs), x0, y0, x1, y1, cssGap, html.EscapeString(iv.Detail))
	}
	ring := func(ns int64, class, title string) {
		q := filt[nearest(run.Filtered, ns)]
		x, y := o.xy(q.X, q.Y)
		o.add(`<circle class="event %s" data-t="%.2f" cx="%.1f" cy="%.1f" r="6" fill="none" stroke="%s" stroke-width="1.5"><title>%.2f s: %s</title></circle>`, class, run.ts(ns), x, y, cssEvent, run.ts(ns), html.EscapeString(title))
	}
	s.eachEvent(ring)
	// Time marks: a short stroke across the track and its time.
	step := tickEvery(run.ts(s.EndNs) - run.ts(s.StartNs))
	for t := math.Ceil(run.ts(s.StartNs)/step) * step; t <= run.ts(s.EndNs); t += step {
		i := nearest(run.Filtered, run.startNs()+int64(t*1e9))
		st := &run.Filtered[i].State
		x, y := o.xy(st.MeanAt(0), st.MeanAt(1))
		// Across the heading, in the SVG's frame (y down).
		nx, ny := math.Sin(st.MeanAt(2)), math.Cos(st.MeanAt(2))
		o.add(`<g class="time-tick" data-t="%g"><line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" stroke="#222" stroke-width="1.2"/><text x="%.1f" y="%.1f" font-size="8" font-family="sans-serif" text-anchor="middle" dominant-baseline="middle" fill="#222">%g s</text></g>`,
			t, x-5*nx, y-5*ny, x+5*nx, y+5*ny, x+13*nx, y+13*ny, t)
	}
}

// outliers draws points outside the axes as triangles at the edge, pointing
// the way they lie (at most 200).
func outliers(o *overlay, pts plotter.XYs, what, colour string) {
	x0, y0, x1, y1 := o.box()
	for i, q := range pts {
		if i == 200 {
			break
		}
		x, y := o.xy(q.X, q.Y)
		cx, cy := math.Min(math.Max(x, x0+5), x1-5), math.Min(math.Max(y, y0+5), y1-5)
		ang := math.Atan2(y-cy, x-cx)
		var b strings.Builder
		for k, a := range []float64{0, 2.4, -2.4} {
			px, py := cx+5*math.Cos(ang+a), cy+5*math.Sin(ang+a)
			fmt.Fprintf(&b, "%c%.1f %.1f", "MLL"[k], px, py)
		}
		fmt.Fprintf(&o.edge, `<path class="outlier-mark" d="%sZ" fill="%s"><title>%s at (%.2f, %.2f) m, outside the axes</title></path>`, b.String(), colour, what, q.X, q.Y)
	}
}

// Figures draws a run's figures, each in a goroutine of its own: they
// share nothing but the run, which they only read.
func (run *Run) Figures() ([]Figure, error) { return run.figures(context.Background()) }

// figures is Figures stopping once ctx is done, with its error: a figure
// not yet begun is not drawn.
func (run *Run) figures(ctx context.Context) ([]Figure, error) {
	draw := []func() (Figure, error){run.trackFigure, run.positionStdFigure, run.headingStdFigure}
	sensors := make([]string, 0, len(run.NIS))
	for k := range run.NIS {
		sensors = append(sensors, k)
	}
	sort.Strings(sensors)
	for _, id := range sensors {
		draw = append(draw, func() (Figure, error) { return run.nisFigure(id) })
	}
	if len(run.Filtered) > 0 && run.Filtered[0].State.Size() == 4 {
		draw = append(draw, run.offsetFigure)
	}
	figs := make([]Figure, len(draw))
	errs := make([]error, len(draw))
	var wg sync.WaitGroup
	for i, f := range draw {
		wg.Go(func() {
			if errs[i] = ctx.Err(); errs[i] == nil {
				figs[i], errs[i] = f()
			}
		})
	}
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	for _, err := range errs {
		if err != nil {
			return nil, err
		}
	}
	return figs, nil
}

// stdSeries returns the standard deviations of x and y (m) and of the
// heading (degrees) over time, filtered and smoothed.
func (run *Run) stdSeries() (sx, sy, ssx, ssy, sh, ssh plotter.XYs) {
	for i, pt := range run.Filtered {
		t := run.ts(pt.StampNs)
		sx = append(sx, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(0, 0))})
		sy = append(sy, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(1, 1))})
		sh = append(sh, plotter.XY{X: t, Y: math.Sqrt(pt.State.At(2, 2)) * 180 / math.Pi})
		s := &run.Smoothed[i].State
		ssx = append(ssx, plotter.XY{X: t, Y: math.Sqrt(s.At(0, 0))})
		ssy = append(ssy, plotter.XY{X: t, Y: math.Sqrt(s.At(1, 1))})
		ssh = append(ssh, plotter.XY{X: t, Y: math.Sqrt(s.At(2, 2)) * 180 / math.Pi})
	}
	return
}

func (run *Run) positionStdFigure() (Figure, error) {
	sx, sy, ssx, ssy, _, _ := run.stdSeries()
	p := plot.New()
	p.Title.Text = "Position standard deviation"
	p.Y.Label.Text = "m"
	logIfWide(p, sx, sy, ssx, ssy)
	line(p, sx, colFiltered, vg.Points(1), "x filtered", false)
	line(p, sy, colFiltered, vg.Points(1), "y filtered", true)
	line(p, ssx, colSmoothed, vg.Points(1), "x smoothed", false)
	line(p, ssy, colSmoothed, vg.Points(1), "y smoothed", true)
	p.Legend.Top = true
	return run.timeFigure("fig-position-std", "Standard deviation of x and y over time, filtered and smoothed; shaded: red not to be trusted, orange fixes refused in a row, grey gaps; dashed lines: moves and slips.", p, vg.Points(300), nil)
}

func (run *Run) headingStdFigure() (Figure, error) {
	_, _, _, _, sh, ssh := run.stdSeries()
	p := plot.New()
	p.Title.Text = "Heading standard deviation"
	p.Y.Label.Text = "deg"
	logIfWide(p, sh, ssh)
	line(p, sh, colFiltered, vg.Points(1), "filtered", false)
	line(p, ssh, colSmoothed, vg.Points(1), "smoothed", false)
	p.Legend.Top = true
	return run.timeFigure("fig-heading-std", "Standard deviation of the heading over time.", p, vg.Points(260), nil)
}

// logIfWide gives the plot a logarithmic y axis when the series span more
// than two decades, so that a blown-up stretch does not flatten the rest.
func logIfWide(p *plot.Plot, series ...plotter.XYs) {
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, s := range series {
		for _, q := range s {
			if q.Y > 0 {
				lo, hi = math.Min(lo, q.Y), math.Max(hi, q.Y)
			}
		}
	}
	if hi > 100*lo {
		p.Y.Scale = plot.LogScale{}
		p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
		p.Y.Min, p.Y.Max = lo, hi
	}
}

// gated reports whether the sensor's inputs pass the NIS gate.
func (run *Run) gated(sensor string) bool { return sensor != "imu" || run.Config.GateIMU }

// nisFigure draws a sensor's NIS: accepted inputs as dots, refused ones as
// red crosses, the 95% band of an accepted one and the gate.
func (run *Run) nisFigure(id string) (Figure, error) {
	pts := run.NIS[id]
	p := plot.New()
	p.Title.Text = "NIS of " + id
	p.Y.Label.Text = "NIS"
	p.Y.Scale = plot.LogScale{}
	p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
	var acc, ref plotter.XYs
	dim := 1
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, n := range pts {
		q := plotter.XY{X: run.ts(n.StampNs), Y: math.Max(n.NIS, 1e-4)}
		if n.Refused {
			ref = append(ref, q)
		} else {
			acc = append(acc, q)
		}
		dim = max(dim, n.Dim)
		lo, hi = math.Min(lo, q.Y), math.Max(hi, q.Y)
	}
	scatter(p, acc, colFiltered, draw.CircleGlyph{}, vg.Points(1), "accepted")
	if len(ref) > 0 {
		legendScatter(p, "refused", colRefused)
	}
	d := distuv.ChiSquared{K: float64(dim)}
	bandLo, bandHi := d.Quantile(0.025), d.Quantile(0.975)
	gate := math.NaN()
	if run.gated(id) && run.Config.GateProbability > 0 && run.Config.GateProbability < 1 {
		gate = d.Quantile(run.Config.GateProbability)
		legendLine(p, fmt.Sprintf("gate (p %g)", run.Config.GateProbability), colRefused, vg.Points(1.5), false)
		hi = math.Max(hi, gate*1.5)
	}
	t0, t1 := run.ts(run.Summary.StartNs), run.ts(run.Summary.EndNs)
	line(p, plotter.XYs{{X: t0, Y: bandLo}, {X: t1, Y: bandLo}}, colBand, vg.Points(1), fmt.Sprintf("95%% band, %d dof", dim), true)
	line(p, plotter.XYs{{X: t0, Y: bandHi}, {X: t1, Y: bandHi}}, colBand, vg.Points(1), "", true)
	if len(pts) > 0 {
		p.Y.Min, p.Y.Max = math.Min(lo, bandLo)/1.5, math.Max(hi, bandHi)*1.5
	}
	p.Legend.Top = true
	caption := fmt.Sprintf("Normalised innovation squared of %s: accepted inputs as dots, refused ones as red crosses, with the two-sided 95%% chi-square band for one accepted input", id)
	if !math.IsNaN(gate) {
		caption += " and the gate line above which inputs are refused"
	}
	return run.timeFigure("fig-nis-"+idPart(id), caption+".", p, vg.Points(280), func(o *overlay) {
		x0, _, x1, _ := o.box()
		if !math.IsNaN(gate) {
			_, y := o.xy(t0, gate)
			o.add(`<line class="gate-line" x1="%.1f" x2="%.1f" y1="%.1f" y2="%.1f" stroke="%s" stroke-width="1.5"><title>gate: NIS %.2f (probability %g, %d dof)</title></line>`, x0, x1, y, y, cssRefused, gate, run.Config.GateProbability, dim)
		}
		for i, q := range ref {
			if i == 3000 {
				break
			}
			x, y := o.xy(q.X, q.Y)
			o.add(`<path class="nis-refused" d="M%.1f %.1fl5 5m0 -5l-5 5" stroke="%s" stroke-width="1.2"/>`, x-2.5, y-2.5, cssRefused)
		}
	})
}

// legendScatter adds a legend entry of a red cross for marks drawn over the
// figure.
func legendScatter(p *plot.Plot, name string, c color.Color) {
	s := &plotter.Scatter{XYs: plotter.XYs{{}}}
	s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = c, draw.CrossGlyph{}, vg.Points(3)
	p.Legend.Add(name, s)
}

// offsetFigure draws the estimated IMU offset.
func (run *Run) offsetFigure() (Figure, error) {
	p := plot.New()
	p.Title.Text = "IMU offset (the IMU's heading zero in the field frame)"
	p.Y.Label.Text = "deg"
	var o, os, lo, hi plotter.XYs
	for i, pt := range run.Filtered {
		t := run.ts(pt.StampNs)
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
	return run.timeFigure("fig-imu-offset", "The estimated IMU offset over time.", p, vg.Points(260), nil)
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
	dx, dy := math.Max(xmax-xmin, 0.5), math.Max(ymax-ymin, 0.5)
	cx, cy := (xmin+xmax)/2, (ymin+ymax)/2
	// The data area is smaller than the figure by the axes' labels; 0.9
	// and 0.85 are near enough for a metre to look a metre both ways.
	w, h = w*0.9, h*0.85
	if dx/dy > w/h {
		dy = dx * h / w
	} else {
		dx = dy * w / h
	}
	p.X.Min, p.X.Max, p.Y.Min, p.Y.Max = cx-dx/2, cx+dx/2, cy-dy/2, cy+dy/2
}
