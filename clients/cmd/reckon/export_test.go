package main

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"reckon.example/clients/export"
)

// TestExport: the demo's journal, written by a real service, exported as
// Parquet; the runs table has the demo's run with as many inputs as the
// inputs table has rows. Bad command lines exit 2, a robot without a
// journal 1.
func TestExport(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "journal")
	if _, errs, err := runCmd(t, "demo", "-duration", "10", "-speed", "0", "-view", "lines", "-journal", dir); err != nil {
		t.Fatalf("demo: %v\n%s", err, errs)
	}
	out := filepath.Join(t.TempDir(), "tables")
	_, errs, err := runCmd(t, "export", "-journal", dir, "-robot", "robots/greenhouse-cart", "-out", out)
	if err != nil || !strings.Contains(errs, "exported 1 runs,") {
		t.Fatalf("export: %v\n%s", err, errs)
	}
	runs, err := parquet.ReadFile[export.RunRow](filepath.Join(out, export.RunsFile))
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(filepath.Join(out, export.InputsFile))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	st, _ := f.Stat()
	inputs, err := parquet.OpenFile(f, st.Size())
	if err != nil {
		t.Fatal(err)
	}
	if len(runs) != 1 || runs[0].Robot != "greenhouse-cart" || runs[0].Run != "live" || runs[0].Inputs == 0 || runs[0].Inputs != inputs.NumRows() || runs[0].Differs != 0 {
		t.Errorf("runs %+v, inputs.parquet %d rows", runs, inputs.NumRows())
	}
	ctx := context.Background()
	for _, args := range [][]string{{"export", "-journal", dir}, {"export", "-out", out}, {"export", "-journal", dir, "-out", out, "-robot", "Not_A_Name"},
		{"export", "-journal", dir, "-out", out, "extra"}, {"export", "-journal", dir, "-out", out, "-row-group", "0"}} {
		if _, errs, code := runCode(t, ctx, "", args...); code != exitUsage || !strings.Contains(errs, "usage") && !strings.Contains(errs, "robot name") {
			t.Errorf("%v: exit %d, want %d; stderr %q", args, code, exitUsage, errs)
		}
	}
	if _, errs, code := runCode(t, ctx, "", "export", "-journal", dir, "-out", t.TempDir(), "-robot", "cart-9"); code != exitNotFound || !strings.Contains(errs, "no journal to export") {
		t.Errorf("export of a robot without a journal: exit %d, stderr %q", code, errs)
	}
}
