package review

import (
	"context"
	"fmt"
	"html"
	"io"
	"strings"
)

// Calibration is what a calibration of a run found and changed, for the
// section at the top of the report that compares the run replayed under the
// configuration before and after it (WriteCalibrationHTML).
type Calibration struct {
	// By names the calibration ("reckon calibrate", "reckon tune").
	By string
	// Findings are the diagnoses' sentences, each naming the field to
	// change.
	Findings []string
	// Columns and Rows are the table of the parameters fitted (their
	// names, fields, configured and fitted values, standard errors and
	// whether the run determined them), as the command prints them.
	Columns []string
	Rows    [][]string
	// Notes follow the table (parameters to apply by hand, the file
	// written).
	Notes []string
}

// WriteCalibrationHTML writes the comparison of a run replayed under the
// configuration before a calibration and after it, as WriteHTML does for
// two runs, with a section "Calibration" at the top: the findings, the
// table of fitted parameters, and a row each for before and after with each
// sensor's mean NIS against its 95% band and, with truth, the filtered
// track's mean NEES and RMS position error.
func WriteCalibrationHTML(w io.Writer, title string, cal Calibration, before, after *Run) error {
	return WriteCalibrationHTMLContext(context.Background(), w, title, cal, before, after)
}

// WriteCalibrationHTMLContext is WriteCalibrationHTML stopping once ctx is
// done, as WriteHTMLContext does.
func WriteCalibrationHTMLContext(ctx context.Context, w io.Writer, title string, cal Calibration, before, after *Run) error {
	return writeHTML(ctx, w, title, func(b *strings.Builder) { calibrationHTML(b, cal, before, after) }, []*Run{before, after})
}

func calibrationHTML(b *strings.Builder, cal Calibration, before, after *Run) {
	b.WriteString("<section id=\"calibration\"><h2>Calibration</h2>\n")
	if cal.By != "" {
		b.WriteString("<p>By " + html.EscapeString(cal.By) + ".</p>\n")
	}
	if len(cal.Findings) > 0 {
		b.WriteString("<ul class=\"findings\">\n")
		for _, f := range cal.Findings {
			b.WriteString("<li class=\"finding\">" + html.EscapeString(f) + "</li>\n")
		}
		b.WriteString("</ul>\n")
	}
	if len(cal.Rows) > 0 {
		b.WriteString("<table class=\"calibration-params\"><tr>")
		for _, c := range cal.Columns {
			b.WriteString("<th>" + html.EscapeString(c) + "</th>")
		}
		b.WriteString("</tr>\n")
		for _, r := range cal.Rows {
			b.WriteString("<tr class=\"calibration-param\">")
			for _, c := range r {
				b.WriteString("<td>" + html.EscapeString(c) + "</td>")
			}
			b.WriteString("</tr>\n")
		}
		b.WriteString("</table>\n")
	}
	for _, n := range cal.Notes {
		b.WriteString("<p>" + html.EscapeString(n) + "</p>\n")
	}
	// The band is the two-sided 95% band of the mean NIS (Bar-Shalom, Li
	// and Kirubarajan 2001, sec. 5.4.2), as the summary gives it; 3 is the
	// mean NEES of a consistent pose covariance (chi-square with 3 degrees
	// of freedom, common practice).
	var sensors []string
	for _, s := range before.Summary.Sensors {
		sensors = append(sensors, s.GetSensorId())
	}
	truth := before.Summary.HasTruth && after.Summary.HasTruth
	b.WriteString("<table class=\"calibration-check\"><tr><th>configuration</th>")
	for _, id := range sensors {
		b.WriteString("<th>" + html.EscapeString(id) + " mean NIS (95% band)</th>")
	}
	if truth {
		b.WriteString("<th>mean NEES, filtered (3 if consistent)</th><th>RMS position error, filtered</th><th>RMS position error, smoothed</th>")
	}
	b.WriteString("</tr>\n")
	for _, r := range []struct {
		name string
		run  *Run
	}{{"before", before}, {"after", after}} {
		label := r.name
		if r.run.Label != r.name {
			label += " (" + r.run.Label + ")"
		}
		fmt.Fprintf(b, "<tr class=\"calibration-%s\"><td>%s</td>", r.name, html.EscapeString(label))
		for _, id := range sensors {
			b.WriteString("<td>" + html.EscapeString(sensorNIS(r.run, id)) + "</td>")
		}
		if truth {
			s := &r.run.Summary
			fmt.Fprintf(b, "<td>%.2f</td><td>%.4f m</td><td>%.4f m</td>", s.FilteredNEES, s.FilteredRMSM, s.SmoothedRMSM)
		}
		b.WriteString("</tr>\n")
	}
	b.WriteString("</table>\n</section>\n")
}

// sensorNIS is a sensor's mean NIS with its band and whether it lies in
// it, or "-" when the run has none.
func sensorNIS(run *Run, id string) string {
	for _, s := range run.Summary.Sensors {
		if s.GetSensorId() == id {
			in := "in"
			if m := s.GetMeanNis(); m < s.GetBandLow() || m > s.GetBandHigh() {
				in = "out"
			}
			return fmt.Sprintf("%.3f [%.3f, %.3f] %s", s.GetMeanNis(), s.GetBandLow(), s.GetBandHigh(), in)
		}
	}
	return "-"
}
