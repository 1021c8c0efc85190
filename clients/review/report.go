package review

import (
	"context"
	"fmt"
	"html"
	"io"
	"math"
	"sort"
	"strings"

	"reckon.example/server/convert"
)

func secs(ns int64) float64 { return float64(ns) * 1e-9 }

// FormatCounts lists non-zero counts as "name n, ..." in name order
// ("none" for none).
func FormatCounts(m map[string]int) string {
	keys := make([]string, 0, len(m))
	for k, v := range m {
		if v > 0 {
			keys = append(keys, k)
		}
	}
	sort.Strings(keys)
	parts := make([]string, len(keys))
	for i, k := range keys {
		parts[i] = fmt.Sprintf("%s %d", k, m[k])
	}
	if len(parts) == 0 {
		return "none"
	}
	return strings.Join(parts, ", ")
}

// lines returns the summary as label and value pairs.
func (run *Run) lines() [][2]string {
	s := &run.Summary
	r95 := fmt.Sprintf("largest %.3f m (at %.2f s), final %.3f m", s.Max95M, secs(s.Max95AtNs), s.Final95M)
	hs := fmt.Sprintf("largest %.2f deg, final %.2f deg", s.MaxHeadingStd*180/math.Pi, s.FinalHeadingSt*180/math.Pi)
	if s.Estimates == 0 {
		// Zero would read as a pose known exactly.
		r95 = "none: no odometry reviewed, so no estimate"
		hs = r95
	}
	out := [][2]string{
		{"robot", run.Robot},
		{"configuration", fmt.Sprintf("%d wheels, imu %s, gate probability %g", len(run.Config.Wheels), run.Config.IMU, run.Config.GateProbability)},
		{"duration", fmt.Sprintf("%.1f s (%.3f to %.3f s), %d inputs", secs(s.EndNs-s.StartNs), secs(s.StartNs), secs(s.EndNs), s.Inputs)},
		{"distance", fmt.Sprintf("%.2f m", s.DistanceM)},
		{"fixes", FormatCounts(s.Fixes)},
		{"refusals by reason", FormatCounts(s.Reasons)},
		{"95% position radius", r95},
		{"heading standard deviation", hs},
	}
	for _, ss := range s.Sensors {
		out = append(out, [2]string{"NIS of " + ss.GetSensorId(), fmt.Sprintf("mean %.2f, 95%% band %.2f to %.2f over %d applied: %s",
			ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh(), ss.GetCounts().GetApplied(), convert.ConsistencyName(ss.GetVerdict()))})
	}
	out = append(out, [2]string{"slips suspected", fmt.Sprint(s.Slips)})
	rec := fmt.Sprint(len(s.Recoveries))
	for i, r := range s.Recoveries {
		if i == 8 {
			rec += fmt.Sprintf("; and %d more", len(s.Recoveries)-8)
			break
		}
		rec += fmt.Sprintf("; at %.2f s: %s", secs(r.FromNs), r.Detail)
	}
	out = append(out, [2]string{"move recoveries", rec})
	dt := fmt.Sprint(len(s.Distrust))
	var total int64
	for _, d := range s.Distrust {
		total += d.ToNs - d.FromNs
	}
	if len(s.Distrust) > 0 {
		dt += fmt.Sprintf(" intervals, %.2f s in all", secs(total))
		for i, d := range s.Distrust {
			if i == 8 {
				dt += fmt.Sprintf("; and %d more", len(s.Distrust)-8)
				break
			}
			dt += fmt.Sprintf("; %.2f to %.2f s: %s", secs(d.FromNs), secs(d.ToNs), d.Detail)
		}
	}
	out = append(out, [2]string{"do-not-trust intervals", dt})
	if s.TruthSteps > 0 {
		out = append(out, [2]string{"truth", fmt.Sprintf("interpolated to %d of %d estimate stamps; largest gap between the truth rows used %.3f s", s.TruthMatched, s.TruthSteps, secs(s.TruthMaxGapNs))})
	}
	if s.HasTruth {
		out = append(out, [2]string{"error against truth", fmt.Sprintf("RMS position %.4f m filtered, %.4f m smoothed", s.FilteredRMSM, s.SmoothedRMSM)})
		// The chi-square with 3 degrees of freedom has mean 3 and median 2.366 (closed form, common practice).
		out = append(out, [2]string{"NEES against truth", fmt.Sprintf("mean %.2f filtered, %.2f smoothed (3 if consistent); median %.2f filtered, %.2f smoothed (2.37 if consistent)",
			s.FilteredNEES, s.SmoothedNEES, s.FilteredNEESMedian, s.SmoothedNEESMedian)})
	}
	if s.MarkersSeen > 0 {
		m := fmt.Sprintf("%d of %d markers carried in landmark blocks stand off their mapped positions beyond the 99%% region (the map's survey error declared %g m)",
			len(s.MarkersOff), s.MarkersSeen, run.Config.LandmarkPositionStdM)
		for i, o := range s.MarkersOff {
			if i == 8 {
				m += fmt.Sprintf("; and %d more", len(s.MarkersOff)-8)
				break
			}
			m += fmt.Sprintf("; %s by (%+.3f, %+.3f) m, standard deviation (%.3f, %.3f)", o.ID, o.DXM, o.DYM, math.Sqrt(o.Cov[0]), math.Sqrt(o.Cov[3]))
		}
		out = append(out, [2]string{"map check", m})
	}
	for _, g := range s.Gaps {
		out = append(out, [2]string{"GAP", g + "; the review goes on past it"})
	}
	for _, note := range []string{s.Truncated, s.Damaged, s.RunNote} {
		if note != "" {
			out = append(out, [2]string{"NOTE", note})
		}
	}
	exports := run.FilteredCSV + ", " + run.SmoothedCSV + ", " + run.FixesCSV
	if run.MarkersCSV != "" {
		exports += ", " + run.MarkersCSV
	}
	out = append(out, [2]string{"exports", exports})
	return out
}

// WriteText writes the plain-text summary of each run.
func WriteText(w io.Writer, runs ...*Run) error {
	for i, run := range runs {
		if i > 0 {
			fmt.Fprintln(w)
		}
		fmt.Fprintf(w, "review of %s\n", run.Label)
		for _, l := range run.lines() {
			if _, err := fmt.Fprintf(w, "  %-28s %s\n", l[0]+":", l[1]); err != nil {
				return err
			}
		}
	}
	return nil
}

const css = `body{font:15px/1.45 system-ui,sans-serif;margin:24px;color:#222;background:#fbfbf8}
h1{font-size:22px;margin:0 0 4px}h2{font-size:18px;margin:22px 0 8px}
table{border-collapse:collapse;margin:8px 0 16px}td,th{padding:3px 10px;border-bottom:1px solid #ddd;vertical-align:top;text-align:left}
td:first-child{color:#555;white-space:nowrap}.note{background:#fff3cd;border:1px solid #e0c060;padding:8px 12px}
figure{margin:0 0 18px;background:#fff;border:1px solid #ddd;padding:8px;max-width:1100px}figure svg{display:block;width:100%;height:auto;cursor:grab;touch-action:none}
figcaption{color:#555;font-size:13px;margin-top:4px}.safety{color:#7a2a00;font-size:13px}
ul.problems{padding-left:20px}li.problem{margin:3px 0}a.moment{font-variant-numeric:tabular-nums;margin-right:6px}
.marks .at{stroke-width:3;stroke-opacity:1}details{margin:12px 0}summary{cursor:pointer;font-weight:600}`

// script lets the reader zoom (wheel) and pan (drag) every figure by
// changing its SVG viewBox, reset it with a double click, and jump to a
// moment from a problem's link: the time figures zoom to it and the track
// centres on its nearest mark. It marks the body when it has run.
const script = `(function(){
var figs=[].slice.call(document.querySelectorAll("figure[data-kind]"));
figs.forEach(function(f){
 var svg=f.querySelector("svg");if(!svg)return;
 var v0=svg.getAttribute("viewBox").split(/[ ,]+/).map(Number),time=f.dataset.kind=="time";
 f.v0=v0;f.v=v0.slice();
 f.set=function(v){f.v=v;svg.setAttribute("viewBox",v.map(function(a){return a.toFixed(2)}).join(" "))};
 function at(e){var r=svg.getBoundingClientRect();return[f.v[0]+(e.clientX-r.left)/r.width*f.v[2],f.v[1]+(e.clientY-r.top)/r.height*f.v[3]]}
 svg.addEventListener("wheel",function(e){e.preventDefault();var p=at(e),k=e.deltaY<0?0.8:1.25,v=f.v;
  var w=Math.min(v0[2],v[2]*k),h=time?v0[3]:Math.min(v0[3],v[3]*k);
  f.set([p[0]-(p[0]-v[0])*w/v[2],time?v0[1]:p[1]-(p[1]-v[1])*h/v[3],w,h])},{passive:false});
 var drag=null;
 svg.addEventListener("pointerdown",function(e){drag={x:e.clientX,y:e.clientY,v:f.v.slice()};svg.setPointerCapture(e.pointerId)});
 svg.addEventListener("pointermove",function(e){if(!drag)return;var r=svg.getBoundingClientRect();
  f.set([drag.v[0]-(e.clientX-drag.x)/r.width*drag.v[2],time?v0[1]:drag.v[1]-(e.clientY-drag.y)/r.height*drag.v[3],drag.v[2],drag.v[3]])});
 svg.addEventListener("pointerup",function(){drag=null});
 svg.addEventListener("dblclick",function(){f.set(v0.slice())});
});
function zoomTo(t){
 [].forEach.call(document.querySelectorAll(".marks .at"),function(e){e.classList.remove("at")});
 figs.forEach(function(f){
  var svg=f.querySelector("svg");if(!svg||!f.v0)return;
  if(f.dataset.kind=="time"){
   var x0=+f.dataset.x0,x1=+f.dataset.x1,t0=+f.dataset.tmin,t1=+f.dataset.tmax,x=x0+(t-t0)/(t1-t0)*(x1-x0),w=f.v0[2]/4;
   f.set([x-w/2,f.v0[1],w,f.v0[3]]);
   var c=svg.querySelector("line.cursor")||svg.appendChild(document.createElementNS("http://www.w3.org/2000/svg","line"));
   c.setAttribute("class","cursor");c.setAttribute("x1",x);c.setAttribute("x2",x);c.setAttribute("y1",0);c.setAttribute("y2",f.v0[3]);c.setAttribute("stroke","#000");c.setAttribute("stroke-width","0.8");
  }else{
   var best=null,d=Infinity;
   [].forEach.call(svg.querySelectorAll(".marks [data-t]"),function(e){var dd=Math.abs(+e.dataset.t-t);if(dd<d){d=dd;best=e}});
   if(!best)return;best.classList.add("at");
   var b=best.getBBox(),w=f.v0[2]/3,h=f.v0[3]/3;
   f.set([b.x+b.width/2-w/2,b.y+b.height/2-h/2,w,h]);
  }
 });
 document.body.setAttribute("data-moment",t);
}
document.addEventListener("click",function(e){var a=e.target.closest&&e.target.closest("a.moment");if(!a)return;e.preventDefault();
 zoomTo(+a.dataset.t);history.replaceState(null,"","#t="+a.dataset.t);var f=document.querySelector("figure[data-kind]");if(f)f.scrollIntoView({behavior:"smooth"})});
var m=/^#t=(-?[0-9.]+)/.exec(location.hash);if(m)zoomTo(+m[1]);
document.body.setAttribute("data-zoom","ready");
document.body.setAttribute("data-figures",[].map.call(document.querySelectorAll("figure"),function(f){var r=f.querySelector("svg").getBoundingClientRect();return f.id+":"+Math.round(r.width)+"x"+Math.round(r.height)}).join(" "));
})();`

// figureHTML writes a figure with what the page's script needs to zoom it.
func figureHTML(b *strings.Builder, id string, f Figure) {
	if f.Time {
		fmt.Fprintf(b, "<figure id=\"%s\" data-kind=\"time\" data-tmin=\"%.3f\" data-tmax=\"%.3f\" data-x0=\"%.2f\" data-x1=\"%.2f\">", id, f.TMinS, f.TMaxS, f.X0, f.X1)
	} else {
		fmt.Fprintf(b, "<figure id=\"%s\" data-kind=\"track\">", id)
	}
	fmt.Fprintf(b, "%s<figcaption>%s</figcaption></figure>\n", f.SVG, html.EscapeString(f.Caption))
}

// problemsHTML writes the problems found, each linked to its moment.
func problemsHTML(b *strings.Builder, run *Run) {
	ps := run.Problems()
	if len(ps) == 0 {
		b.WriteString("<p class=\"problems-none\">No problem found: no sensor disagreed, no wheel slipped, no gap, no fixes refused in a row, trust never lost.</p>\n")
		return
	}
	b.WriteString("<ul class=\"problems\">\n")
	for _, p := range ps {
		t := run.ts(p.AtNs)
		fmt.Fprintf(b, "<li class=\"problem\" data-kind=\"%s\"><a class=\"moment\" href=\"#t=%.2f\" data-t=\"%.2f\">%.1f s</a>%s</li>\n", p.Kind, t, t, t, html.EscapeString(p.Text))
	}
	b.WriteString("</ul>\n")
}

func notesHTML(b *strings.Builder, runs []*Run) {
	for _, run := range runs {
		for _, g := range run.Summary.Gaps {
			b.WriteString("<p class=\"note\"><b>" + html.EscapeString(run.Label) + ":</b> " + html.EscapeString(g) + "; the review goes on past it</p>\n")
		}
		for _, note := range []string{run.Summary.Truncated, run.Summary.Damaged, run.Summary.RunNote} {
			if note != "" {
				b.WriteString("<p class=\"note\"><b>" + html.EscapeString(run.Label) + ":</b> " + html.EscapeString(note) + "</p>\n")
			}
		}
	}
}

// runHTML writes one run's problems, summary and figures; n numbers the
// run's figures in the page. It stops with ctx's error once ctx is done,
// at the next figure.
func runHTML(ctx context.Context, b *strings.Builder, run *Run, n int) error {
	figs, err := run.figures(ctx)
	if err != nil {
		return err
	}
	b.WriteString("<h2>Problems found</h2>\n")
	problemsHTML(b, run)
	b.WriteString("<h2>Figures</h2>\n")
	for _, f := range figs {
		figureHTML(b, fmt.Sprintf("%s-%d", f.ID, n), f)
	}
	b.WriteString("<h2>Summary</h2><table>\n")
	for _, l := range run.lines() {
		b.WriteString("<tr><td>" + html.EscapeString(l[0]) + "</td><td>" + html.EscapeString(l[1]) + "</td></tr>\n")
	}
	b.WriteString("</table>\n")
	return nil
}

// WriteHTML writes the report of one run, or the comparison of several:
// their tracks, deviations and NIS overlaid, a table of their differences,
// and each run's own report folded below. It is one self-contained file
// (inline styles, SVG figures and a small script for zoom and pan; no
// network).
func WriteHTML(w io.Writer, title string, runs ...*Run) error {
	return WriteHTMLContext(context.Background(), w, title, runs...)
}

// WriteHTMLContext is WriteHTML stopping once ctx is done, with its
// error: the figures are drawn one by one (at most tens of milliseconds
// each), ctx is checked before each, and the page goes to w only once
// whole, so that w gets nothing from a report stopped part-way.
func WriteHTMLContext(ctx context.Context, w io.Writer, title string, runs ...*Run) error {
	return writeHTML(ctx, w, title, nil, runs)
}

// writeHTML is WriteHTMLContext with top, if set, writing a section before
// the runs' own.
func writeHTML(ctx context.Context, w io.Writer, title string, top func(b *strings.Builder), runs []*Run) error {
	var b strings.Builder
	b.WriteString("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width\"><title>" + html.EscapeString(title) + "</title><style>" + css + "</style></head><body>\n")
	b.WriteString("<h1>" + html.EscapeString(title) + "</h1>\n")
	b.WriteString("<p class=\"safety\">A review of recorded estimates. The estimate is no safety function; see the README's cautions.</p>\n")
	if top != nil {
		top(&b)
	}
	notesHTML(&b, runs)
	if len(runs) == 1 {
		if err := runHTML(ctx, &b, runs[0], 0); err != nil {
			return err
		}
	} else if len(runs) > 1 {
		if err := compareHTML(ctx, &b, runs); err != nil {
			return err
		}
		for i, run := range runs {
			b.WriteString("<details class=\"run\"><summary>The review of " + html.EscapeString(run.Label) + " alone</summary>\n")
			if err := runHTML(ctx, &b, run, i); err != nil {
				return err
			}
			b.WriteString("</details>\n")
		}
	}
	b.WriteString("<script>" + script + "</script>\n</body></html>\n")
	if err := ctx.Err(); err != nil {
		return err
	}
	_, err := io.WriteString(w, b.String())
	return err
}
