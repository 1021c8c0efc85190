package review

import (
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
	out := [][2]string{
		{"robot", run.Robot},
		{"configuration", fmt.Sprintf("%d wheels, imu %s, gate probability %g", len(run.Config.Wheels), run.Config.IMU, run.Config.GateProbability)},
		{"duration", fmt.Sprintf("%.1f s (%.3f to %.3f s), %d inputs", secs(s.EndNs-s.StartNs), secs(s.StartNs), secs(s.EndNs), s.Inputs)},
		{"distance", fmt.Sprintf("%.2f m", s.DistanceM)},
		{"fixes", FormatCounts(s.Fixes)},
		{"refusals by reason", FormatCounts(s.Reasons)},
		{"95% position radius", fmt.Sprintf("largest %.3f m (at %.2f s), final %.3f m", s.Max95M, secs(s.Max95AtNs), s.Final95M)},
		{"heading standard deviation", fmt.Sprintf("largest %.2f deg, final %.2f deg", s.MaxHeadingStd*180/math.Pi, s.FinalHeadingSt*180/math.Pi)},
	}
	for _, ss := range s.Sensors {
		out = append(out, [2]string{"NIS of " + ss.GetSensorId(), fmt.Sprintf("mean %.2f, 95%% band %.2f to %.2f over %d applied: %s",
			ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh(), ss.GetCounts().GetApplied(), convert.ConsistencyName(ss.GetVerdict()))})
	}
	out = append(out, [2]string{"slips suspected", fmt.Sprint(s.Slips)})
	rec := fmt.Sprint(len(s.Recoveries))
	for _, r := range s.Recoveries {
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
	for _, g := range s.Gaps {
		out = append(out, [2]string{"GAP", g + "; the review goes on past it"})
	}
	if s.Truncated != "" {
		out = append(out, [2]string{"NOTE", s.Truncated})
	}
	out = append(out, [2]string{"exports", run.FilteredCSV + ", " + run.SmoothedCSV + ", " + run.FixesCSV})
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
table{border-collapse:collapse;margin:8px 0 16px}td{padding:3px 10px;border-bottom:1px solid #ddd;vertical-align:top}
td:first-child{color:#555;white-space:nowrap}.note{background:#fff3cd;border:1px solid #e0c060;padding:8px 12px}
.cols{display:grid;grid-template-columns:repeat(var(--n),minmax(0,1fr));gap:18px}
figure{margin:0 0 18px;background:#fff;border:1px solid #ddd;padding:8px}figure svg{display:block;width:100%;height:auto}
figcaption{color:#555;font-size:13px;margin-top:4px}.safety{color:#7a2a00;font-size:13px}`

// WriteHTML writes the report: one run reviewed, or several compared side
// by side. It is self-contained (inline styles and SVG figures).
func WriteHTML(w io.Writer, title string, runs ...*Run) error {
	var b strings.Builder
	b.WriteString("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>" + html.EscapeString(title) + "</title><style>" + css + "</style></head><body>\n")
	b.WriteString("<h1>" + html.EscapeString(title) + "</h1>\n")
	b.WriteString("<p class=\"safety\">A review of recorded estimates. The estimate is no safety function; see the README's cautions.</p>\n")
	for _, run := range runs {
		for _, g := range run.Summary.Gaps {
			b.WriteString("<p class=\"note\"><b>" + html.EscapeString(run.Label) + ":</b> " + html.EscapeString(g) + "; the review goes on past it</p>\n")
		}
		if run.Summary.Truncated != "" {
			b.WriteString("<p class=\"note\"><b>" + html.EscapeString(run.Label) + ":</b> " + html.EscapeString(run.Summary.Truncated) + "</p>\n")
		}
	}
	fmt.Fprintf(&b, "<div class=\"cols\" style=\"--n:%d\">\n", len(runs))
	figsOf := make([][]Figure, len(runs))
	for i, run := range runs {
		figs, err := run.Figures()
		if err != nil {
			return err
		}
		figsOf[i] = figs
		b.WriteString("<section><h2>" + html.EscapeString(run.Label) + "</h2><table>\n")
		for _, l := range run.lines() {
			b.WriteString("<tr><td>" + html.EscapeString(l[0]) + "</td><td>" + html.EscapeString(l[1]) + "</td></tr>\n")
		}
		b.WriteString("</table>\n")
		for _, f := range figs {
			fmt.Fprintf(&b, "<figure id=\"%s-%d\">%s<figcaption>%s</figcaption></figure>\n", f.ID, i, f.SVG, html.EscapeString(f.Caption))
		}
		b.WriteString("</section>\n")
	}
	b.WriteString("</div>\n")
	// Marks each figure's rendered size, so that an automated check in a
	// real browser can see that every figure is drawn.
	b.WriteString(`<script>document.body.setAttribute("data-figures",Array.from(document.querySelectorAll("figure")).map(function(f){var r=f.querySelector("svg").getBoundingClientRect();return f.id+":"+Math.round(r.width)+"x"+Math.round(r.height)}).join(" "))</script>` + "\n</body></html>\n")
	_, err := io.WriteString(w, b.String())
	return err
}
