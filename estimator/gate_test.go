package estimator

import (
	"bufio"
	"errors"
	"math"
	"os"
	"strconv"
	"strings"
	"testing"
)

// TestGateThresholdTable checks the gate against the chi-square critical
// values of the NIST/SEMATECH e-Handbook of Statistical Methods, section
// 1.3.6.7.4, kept with their source in testdata/reference.
func TestGateThresholdTable(t *testing.T) {
	f, err := os.Open("../testdata/reference/chi-square-upper.tsv")
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	rows := 0
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		fields := strings.Fields(line)
		dof, _ := strconv.Atoi(fields[0])
		prob, _ := strconv.ParseFloat(fields[1], 64)
		want, _ := strconv.ParseFloat(fields[2], 64)
		got, err := GateThreshold(prob, dof)
		if err != nil {
			t.Fatal(err)
		}
		// The table prints three decimals.
		if math.Abs(got-want) > 0.0006 {
			t.Errorf("chi-square %d dof at %v: %.4f, table %.3f", dof, prob, got, want)
		}
		rows++
	}
	if rows < 10 {
		t.Fatalf("read %d table rows", rows)
	}
	for _, bad := range []float64{0, 1, -0.5, math.NaN()} {
		if _, err := GateThreshold(bad, 1); err == nil {
			t.Errorf("probability %v accepted", bad)
		}
	}
}

// TestGate: the zero gate passes everything, NaN included; a gate that is
// on passes up to its threshold.
func TestGate(t *testing.T) {
	if g := NoGate(); g.On() || !g.Passes(1e300) || !g.Passes(math.NaN()) {
		t.Errorf("NoGate refuses something")
	}
	g, err := GateAt(0.99, 2)
	if err != nil {
		t.Fatal(err)
	}
	// chi-square 2 dof, 0.99 quantile = -2 ln(0.01) (closed form for 2 dof).
	want := -2 * math.Log(0.01)
	if !g.On() || math.Abs(g.Threshold()-want) > 1e-9 || !g.Passes(want-1e-6) || g.Passes(want+1e-6) || g.Passes(math.NaN()) {
		t.Errorf("GateAt(0.99, 2) = %+v, threshold want %g", g, want)
	}
	if _, err := GateAt(1, 2); err == nil {
		t.Errorf("probability 1 accepted")
	}
}

// TestCheckCovarianceShape: a covariance of the wrong size is an ErrShape.
func TestCheckCovarianceShape(t *testing.T) {
	if err := CheckCovariance([]float64{1, 0, 0, 1}, 3); !errors.Is(err, ErrShape) {
		t.Errorf("4 entries for 3x3: %v", err)
	}
	if err := CheckCovariance([]float64{1, 0, 0, 1}, 2); err != nil {
		t.Errorf("identity: %v", err)
	}
}
