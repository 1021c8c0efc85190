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

// TestCheckCovarianceSinglePrecision: a covariance rotated into another
// frame in single precision (R C R^T in float32, each half computed on its
// own, as a microcontroller or an image library may) differs between its
// halves by float32's rounding (IEEE 754 binary32, unit roundoff 2^-24,
// about 6e-8; common practice) and is taken; halves that differ by a
// thousandth are not. It fails at the tolerance before (1e-9).
func TestCheckCovarianceSinglePrecision(t *testing.T) {
	s, c := float32(math.Sin(0.7)), float32(math.Cos(0.7))
	r := [2][2]float32{{c, -s}, {s, c}}
	d := [2]float32{0.09, 0.0004}
	var out [2][2]float32
	for i := range 2 {
		for j := range 2 {
			// Summed in the order that makes (i, j) and (j, i) round apart.
			if i <= j {
				out[i][j] = r[i][0]*d[0]*r[j][0] + r[i][1]*d[1]*r[j][1]
			} else {
				out[i][j] = r[i][1]*d[1]*r[j][1] + r[i][0]*d[0]*r[j][0]
			}
		}
	}
	cov := []float64{float64(out[0][0]), float64(out[0][1]), float64(out[1][0]), float64(out[1][1])}
	if err := CheckCovariance(cov, 2); err != nil {
		t.Errorf("single-precision covariance %v: %v", cov, err)
	}
	cov[1] *= 1.001
	if err := CheckCovariance(cov, 2); err == nil {
		t.Errorf("halves a thousandth apart taken: %v", cov)
	}
}
