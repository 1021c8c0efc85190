package export

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"testing"
)

// duckdbModules returns the node_modules directory holding @duckdb/node-api
// (RECKON_DUCKDB, else duckdb/node_modules), or skips the test.
func duckdbModules(t *testing.T) string {
	t.Helper()
	dir, set := os.LookupEnv("RECKON_DUCKDB")
	if !set {
		dir = filepath.Join("duckdb", "node_modules")
	}
	if _, err := os.Stat(filepath.Join(dir, "@duckdb", "node-api")); err != nil {
		if set {
			t.Fatalf("RECKON_DUCKDB=%s holds no @duckdb/node-api: %v", dir, err)
		}
		t.Skip("DuckDB check skipped: set RECKON_DUCKDB to a node_modules directory with @duckdb/node-api " +
			"(npm ci in clients/export/duckdb), as .ci/run does")
	}
	if _, err := exec.LookPath("node"); err != nil {
		t.Fatalf("DuckDB check: %s is there but node is not on PATH: %v", dir, err)
	}
	abs, err := filepath.Abs(dir)
	if err != nil {
		t.Fatal(err)
	}
	return abs
}

// duckdbReport is what check.mjs prints. DuckDB's BIGINT and HUGEINT come
// as strings.
type duckdbReport struct {
	DuckDB string `json:"duckdb"`
	Counts struct {
		Runs   int64 `json:"runs,string"`
		Inputs int64 `json:"inputs,string"`
		Poses  int64 `json:"poses,string"`
		Events int64 `json:"events,string"`
	} `json:"counts"`
	Types map[string]map[string]string `json:"types"`
	Runs  []struct {
		Robot        string `json:"robot"`
		Run          string `json:"run"`
		Deleted      bool   `json:"deleted"`
		Inputs       int64  `json:"inputs,string"`
		Fixes        int64  `json:"fixes,string"`
		Applied      int64  `json:"applied,string"`
		Held         int64  `json:"held,string"`
		Gated        int64  `json:"gated,string"`
		Events       int64  `json:"events,string"`
		DistrustedNs int64  `json:"distrusted_ns,string"`
	} `json:"runs"`
	Inputs []struct {
		Robot       string `json:"robot"`
		Run         string `json:"run"`
		Inputs      int64  `json:"inputs,string"`
		Fixes       int64  `json:"fixes,string"`
		Applied     int64  `json:"applied,string"`
		Gated       int64  `json:"gated,string"`
		HeldDecided int64  `json:"held_decided,string"`
		First       int64  `json:"first_sequence,string"`
		Last        int64  `json:"last_sequence,string"`
		WithNIS     int64  `json:"with_nis,string"`
	} `json:"inputs"`
	Distrusted []struct {
		Robot        string `json:"robot"`
		Run          string `json:"run"`
		DistrustedNs int64  `json:"distrusted_ns,string"`
	} `json:"distrusted"`
	Last []struct {
		Robot       string   `json:"robot"`
		Run         string   `json:"run"`
		Sequence    int64    `json:"sequence,string"`
		StampNs     int64    `json:"stamp_ns,string"`
		XM          float64  `json:"x_m"`
		YM          float64  `json:"y_m"`
		HeadingRad  float64  `json:"heading_rad"`
		CovXXM2     float64  `json:"cov_xx_m2"`
		CovXYM2     float64  `json:"cov_xy_m2"`
		CovHHRad2   float64  `json:"cov_hh_rad2"`
		Position95M float64  `json:"position95_m"`
		Trusted     bool     `json:"trusted"`
		Distrust    []string `json:"distrust"`
	} `json:"last"`
	Sensors []struct {
		Robot         string  `json:"robot"`
		SensorID      string  `json:"sensor_id"`
		Fixes         int64   `json:"fixes,string"`
		GatedFraction float64 `json:"gated_fraction"`
	} `json:"sensors"`
	Events []struct {
		Robot string `json:"robot"`
		Run   string `json:"run"`
		Kind  string `json:"kind"`
		N     int64  `json:"n,string"`
	} `json:"events"`
	Unjoined int64 `json:"unjoined,string"`
}

// TestDuckDBReadsTheExport: DuckDB (its Node package, outside the Go
// module) reads the exported tables, and its counts, column types, values
// and aggregates equal those of the journals replayed here.
func TestDuckDBReadsTheExport(t *testing.T) {
	modules := duckdbModules(t)
	dir := fleet(t)
	out := t.TempDir()
	runRows, err := Export(context.Background(), dir, out, Options{Deleted: true, RowGroupRows: 4096})
	if err != nil {
		t.Fatal(err)
	}
	runs, err := Runs(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	w := replayAll(t, dir, runs)

	cmd := exec.Command("node", filepath.Join("duckdb", "check.mjs"), out)
	cmd.Env = append(os.Environ(), "RECKON_DUCKDB="+modules)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	js, err := cmd.Output()
	if err != nil {
		t.Fatalf("node check.mjs: %v\n%s", err, stderr.String())
	}
	var got duckdbReport
	if err := json.Unmarshal(js, &got); err != nil {
		t.Fatalf("check.mjs output: %v\n%s", err, js)
	}
	t.Logf("DuckDB %s", got.DuckDB)

	if got.Counts.Runs != int64(len(runs)) || got.Counts.Inputs != int64(len(w.inputs)) || got.Counts.Poses != int64(len(w.poses)) || got.Counts.Events != int64(len(w.events)) {
		t.Errorf("DuckDB counts %+v, want %d runs, %d inputs, %d poses, %d events", got.Counts, len(runs), len(w.inputs), len(w.poses), len(w.events))
	}
	types := map[string]map[string]string{
		"poses":  {"stamp_ns": "BIGINT", "x_m": "DOUBLE", "cov_xy_m2": "DOUBLE", "trusted": "BOOLEAN", "distrust": "VARCHAR[]"},
		"inputs": {"sequence": "BIGINT", "verdict": "VARCHAR", "nis": "DOUBLE", "status_code": "INTEGER"},
		"runs":   {"delete_time_unix_ns": "BIGINT", "distrusted_ns": "BIGINT", "deleted": "BOOLEAN"},
		"events": {"kind": "VARCHAR", "value": "DOUBLE"},
	}
	for table, cols := range types {
		for col, typ := range cols {
			if got.Types[table][col] != typ {
				t.Errorf("%s.%s is %q in DuckDB, want %s", table, col, got.Types[table][col], typ)
			}
		}
	}

	totals := w.totals()
	byRun := map[string]RunRow{}
	for _, r := range runRows {
		byRun[r.Robot+"/"+r.Run] = r
	}
	if len(got.Runs) != len(runRows) {
		t.Errorf("DuckDB sees %d runs, want %d", len(got.Runs), len(runRows))
	}
	for _, r := range got.Runs {
		k, want := r.Robot+"/"+r.Run, byRun[r.Robot+"/"+r.Run]
		if r.Deleted != want.Deleted || r.Inputs != want.Inputs || r.Fixes != want.Fixes || r.Applied != want.Applied || r.Held != want.Held ||
			r.Gated != want.Gated || r.Events != want.Events || r.DistrustedNs != want.DistrustedNs || r.Inputs != int64(w.pairs[k]) {
			t.Errorf("DuckDB runs row %s: %+v, want %+v", k, r, want)
		}
	}
	for _, r := range got.Inputs {
		k, tt := r.Robot+"/"+r.Run, totals[r.Robot+"/"+r.Run]
		if tt == nil || r.Inputs != tt.inputs || r.Fixes != tt.fixes || r.Applied != tt.applied || r.Gated != tt.gated || r.First != 1 || r.Last != tt.inputs {
			t.Errorf("DuckDB inputs of %s: %+v, want %+v", k, r, tt)
		}
	}
	var heldDecided int64
	for _, in := range w.inputs {
		if in.Verdict == "held" && in.FinalVerdict != "held" {
			heldDecided++
		}
	}
	var sqlHeldDecided int64
	for _, r := range got.Inputs {
		sqlHeldDecided += r.HeldDecided
	}
	if sqlHeldDecided != heldDecided {
		t.Errorf("DuckDB finds %d held inputs decided later, want %d", sqlHeldDecided, heldDecided)
	}
	sqlDistrusted := map[string]int64{}
	for _, r := range got.Distrusted {
		sqlDistrusted[r.Robot+"/"+r.Run] = r.DistrustedNs
	}
	for k, tt := range totals {
		if sqlDistrusted[k] != tt.distrustedNs || byRun[k].DistrustedNs != tt.distrustedNs {
			t.Errorf("%s: distrusted %d ns by DuckDB's window query, %d in runs, want %d", k, sqlDistrusted[k], byRun[k].DistrustedNs, tt.distrustedNs)
		}
	}

	last := map[string]PoseRow{}
	for _, p := range w.poses {
		last[p.Robot+"/"+p.Run] = p
	}
	for _, r := range got.Last {
		p := last[r.Robot+"/"+r.Run]
		distrust := r.Distrust
		if len(distrust) == 0 {
			distrust = nil
		}
		// Doubles pass through DuckDB and JSON exactly (shortest round-trip
		// formatting both ways).
		if r.Sequence != p.Sequence || r.StampNs != p.StampNs || r.XM != p.XM || r.YM != p.YM || r.HeadingRad != p.HeadingRad ||
			r.CovXXM2 != p.CovXXM2 || r.CovXYM2 != p.CovXYM2 || r.CovHHRad2 != p.CovHHRad2 || r.Position95M != p.Position95M ||
			r.Trusted != p.Trusted || !reflect.DeepEqual(distrust, p.Distrust) {
			t.Errorf("DuckDB's last pose of %s/%s: %+v, want %+v", r.Robot, r.Run, r, p)
		}
	}
	if len(got.Last) != len(last) {
		t.Errorf("DuckDB finds the last pose of %d runs, want %d", len(got.Last), len(last))
	}

	type sensorKey struct{ robot, sensor string }
	fixes, gated := map[sensorKey]int64{}, map[sensorKey]int64{}
	for _, in := range w.inputs {
		if in.Kind == "fix" {
			k := sensorKey{in.Robot, in.SensorID}
			fixes[k]++
			if in.FinalVerdict == "gated" {
				gated[k]++
			}
		}
	}
	for _, s := range got.Sensors {
		k := sensorKey{s.Robot, s.SensorID}
		want := float64(gated[k]) / float64(fixes[k])
		if s.Fixes != fixes[k] || math.Abs(s.GatedFraction-want) > 1e-12 {
			t.Errorf("DuckDB: sensor %v: %d fixes, gated fraction %g; want %d, %g", k, s.Fixes, s.GatedFraction, fixes[k], want)
		}
	}
	if len(got.Sensors) != len(fixes) {
		t.Errorf("DuckDB finds %d sensors, want %d", len(got.Sensors), len(fixes))
	}

	kinds := map[[3]string]int64{}
	for _, e := range w.events {
		kinds[[3]string{e.Robot, e.Run, e.Kind}]++
	}
	for _, e := range got.Events {
		if n := kinds[[3]string{e.Robot, e.Run, e.Kind}]; e.N != n {
			t.Errorf("DuckDB: %d %s events in %s/%s, want %d", e.N, e.Kind, e.Robot, e.Run, n)
		}
	}
	if len(got.Events) != len(kinds) || got.Unjoined != 0 {
		t.Errorf("DuckDB: %d event groups (want %d), %d inputs without their pose", len(got.Events), len(kinds), got.Unjoined)
	}
}
