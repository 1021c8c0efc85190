package review

import (
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"sort"
	"strconv"
	"strings"
	"testing"

	"reckon.example/estimator"
)

// TestTruthInterpolation checks the truth interpolated to stamps between,
// at and outside its rows against values computed by hand.
func TestTruthInterpolation(t *testing.T) {
	const csvText = "stamp_ns,x_m,y_m,heading_rad\n" +
		"1000,0,0,0\n" +
		"1100,1,2,0.4\n" +
		"1300,3,2,3.0\n" +
		"1400,3,4,-3.0\n"
	tr := newTruthReader(strings.NewReader(csvText))
	for _, c := range []struct {
		stamp     int64
		ok        bool
		x, y, h   float64
		gapNs     int64
		reasoning string
	}{
		{900, false, 0, 0, 0, 0, "before the first row"},
		{1000, true, 0, 0, 0, 0, "exactly the first row"},
		{1025, true, 0.25, 0.5, 0.1, 100, "a quarter of the way: 0.25*1, 0.25*2, 0.25*0.4"},
		{1200, true, 2, 2, 1.7, 200, "half way: (1+3)/2, 2, (0.4+3.0)/2"},
		// Across the wrap: 3.0 to -3.0 is +0.2832 rad (2*pi - 6); a
		// quarter of it is 0.0708, so 3.0708 rad.
		{1325, true, 3, 2.5, 3 + 0.25*(2*math.Pi-6), 100, "wrapped heading"},
		// Three quarters: 3.0 + 0.75*0.2832 = 3.2124, wrapped to -3.0708.
		{1375, true, 3, 3.5, 3 + 0.75*(2*math.Pi-6) - 2*math.Pi, 100, "wrapped past pi"},
		{1400, true, 3, 4, -3.0, 0, "exactly the last row"},
		{1500, false, 0, 0, 0, 0, "after the last row"},
	} {
		p, gap, ok := tr.at(c.stamp)
		if ok != c.ok {
			t.Fatalf("%s: at(%d) ok %v", c.reasoning, c.stamp, ok)
		}
		if !ok {
			continue
		}
		const tol = 1e-12
		if math.Abs(p.X-c.x) > tol || math.Abs(p.Y-c.y) > tol || math.Abs(p.Heading-c.h) > tol || gap != c.gapNs {
			t.Errorf("%s: at(%d) = %+v gap %d, want (%g, %g, %g) gap %d", c.reasoning, c.stamp, p, gap, c.x, c.y, c.h, c.gapNs)
		}
	}
}

// TestLogHistogramMedian: the bounded median is within half a bin (0.05%)
// of the exact one, for chi-square-like values over several decades, and
// for values outside the bins counted in an array (below 6e-15, above
// 1.6e14) or across them, with zeros or not, wherever the median falls.
func TestLogHistogramMedian(t *testing.T) {
	rng := rand.New(rand.NewPCG(79, 79))
	for _, c := range []struct {
		n      int
		lo, hi float64 // uniform log range; 0, 0 for chi-square-like values
		zeros  bool
	}{{1, 0, 0, false}, {2, 0, 0, false}, {101, 0, 0, false}, {10000, 0, 0, false},
		{1001, -200, -40, false}, {1001, 40, 200, false}, {1001, -60, 60, false},
		{1001, -200, 200, true}, {3, -60, 60, true}, {10000, 33, 40, true}} {
		var h logHistogram
		v := make([]float64, c.n)
		for i := range v {
			v[i] = math.Exp(c.lo + (c.hi-c.lo)*rng.Float64())
			if c.lo == c.hi {
				v[i] = math.Exp(3 * rng.NormFloat64())
			}
			if c.zeros && i%3 == 0 {
				v[i] = 0
			}
			h.add(v[i])
		}
		sort.Float64s(v)
		if got, want := h.median(), v[c.n/2]; math.Abs(got-want) > 5e-4*want {
			t.Errorf("%+v: median %g, exact %g", c, got, want)
		}
	}
}

// TestTruthReaderSplitsAsCSV: the truth reader's own line splitting gives
// the rows encoding/csv gives (the reference here, as the reader used it
// before), whatever the file holds: CRLF line ends, empty lines, a last
// line without its newline, quoted fields (one spanning two lines), a bare
// carriage return, a bare quote (encoding/csv stops there), a line longer
// than the reader's buffer, short rows and a header. The reference applies
// the reader's rules to encoding/csv's records (a header only first; then
// rows of an integer stamp after the last and three finite numbers), and
// the reader stops with an error naming encoding/csv's line where the
// reference stops.
func TestTruthReaderSplitsAsCSV(t *testing.T) {
	long := "7," + strings.Repeat("1", 70000) + ",2,3\n"
	for _, text := range []string{
		"stamp_ns,x_m,y_m,heading_rad\n1,2,3,4\n5,6,7,8\n",
		"stamp_ns,x_m,y_m,heading_rad\r\n1,2,3,4\r\n\r\n\n5,6,7,8\r\n9,1,2,3",
		"1,2,3,4\n5,6\n7,8,9,1,2\n\n3,4,5,6\r",
		"1,2,3,4\n7,8,9,1,2\n\n13,4,5,6\r",
		"1,2,3,4\n\"5\",6,7,8\n9,\"1\n2\",3,4\n5,6,7,8\n",
		"1,2,3,4\n\"5\",6,7,8\n9,\"1\n2\",3,4\n\n15,6,7,8\nx,1,2,3\n",
		"1,2,3,4\n5,6\r7,8,9\n1,2,3,4\n",
		"1,2,3,4\n5,6\"7,8,9\n1,2,3,4\n",
		"1,2,3,4\n" + long + "8,6,7,8\n",
		"1,2,3,4\n" + long + "8,6,7,8\n9,1,2\n",
		"x,1e3,-2.5e-1,0x1p-2\n10,1e3,-2.5e-1,0x1p-2\n11,nan,inf,-0\n",
		"",
	} {
		var want []truthRow
		wantLine, wantErr := 0, ""
		r := csv.NewReader(strings.NewReader(text))
		r.FieldsPerRecord = -1
		for n := 1; ; n++ {
			rec, err := r.Read()
			if err == io.EOF {
				break
			}
			line, _ := r.FieldPos(0)
			if err != nil {
				wantLine = -1 // encoding/csv's own error, its line as the file's
				wantErr = err.Error()
				break
			}
			stamp, err := strconv.ParseInt(rec[0], 10, 64)
			if err != nil && n == 1 {
				continue
			}
			if err != nil || len(rec) < 4 || (len(want) > 0 && stamp <= want[len(want)-1].stamp) {
				wantLine = line
				break
			}
			var v [3]float64
			for i := range v {
				if v[i], err = strconv.ParseFloat(rec[i+1], 64); err != nil || math.IsNaN(v[i]) || math.IsInf(v[i], 0) {
					wantLine = line
				}
			}
			if wantLine != 0 {
				break
			}
			want = append(want, truthRow{stamp, estimator.Pose{X: v[0], Y: v[1], Heading: v[2]}})
		}
		var got []truthRow
		tr := newTruthReader(strings.NewReader(text))
		for ; tr.haveNext; tr.advance() {
			got = append(got, tr.next)
		}
		if fmt.Sprint(got) != fmt.Sprint(want) {
			t.Errorf("%q:\n got %v\nwant %v", text[:min(len(text), 60)], got, want)
		}
		switch {
		case wantLine == 0 && tr.err != nil, wantLine != 0 && tr.err == nil:
			t.Errorf("%q: error %v, want one at line %d", text[:min(len(text), 60)], tr.err, wantLine)
		case wantLine > 0 && !strings.HasPrefix(tr.err.Error(), fmt.Sprintf("line %d: ", wantLine)):
			t.Errorf("%q: error %v, want it at line %d", text[:min(len(text), 60)], tr.err, wantLine)
		case wantLine < 0 && tr.err.Error() != wantErr:
			t.Errorf("%q: error %v, want encoding/csv's %v", text[:min(len(text), 60)], tr.err, wantErr)
		}
	}
}
