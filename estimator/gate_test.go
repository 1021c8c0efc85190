package estimator

import (
	"bufio"
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
