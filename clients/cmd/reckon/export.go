package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"path/filepath"

	"reckon.example/clients/export"
	"reckon.example/server/journal"
)

func runExport(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("export", "-journal DIR [-robot NAME ...] -out DIR [flags]", `
Replays the journals in a directory and writes them as Apache Parquet
tables for data engines: runs.parquet (one row per run), inputs.parquet
(every input with its verdict, a held fix's final verdict, NIS, reason and
status code), poses.parquet (the fused pose with its covariance and trust
after every input) and events.parquet. A robot's journal is "live"; the
journals set aside when it was deleted are "deleted-{unix ns}". A journal
holds a run per controller boot: the key run is the journal's name for the
first, "{journal}/{n}" for run n after a restart (columns journal,
run_number, boot_id); -run N exports run N of each journal only. Column
names carry their units (stamp_ns, x_m, cov_xx_m2).`)
	dir := fs.String("journal", "", "journal directory (reckond -journal)")
	var robots []string
	fs.Func("robot", "robot id or name to export; repeat for several (default all)", func(s string) error {
		_, id, err := robotName(s)
		if err == nil {
			robots = append(robots, id)
		}
		return err
	})
	out := fs.String("out", "", "directory for the four .parquet files (created if needed)")
	deleted := fs.Bool("deleted", true, "also export the journals of deleted robots")
	run := fs.Int64("run", 0, "export only this run of each journal, from 1 (default: every run)"+noRunHelp)
	rowGroup := fs.Int("row-group", 1<<16, "rows per Parquet row group")
	if err := parseNone(fs, args, stdout, stderr); err != nil {
		return err
	}
	if *dir == "" || *out == "" {
		return usagef(fs, "needs -journal and -out")
	}
	if *rowGroup <= 0 {
		return usagef(fs, "-row-group must be positive, got %d", *rowGroup)
	}
	if *run < 0 {
		return usagef(fs, "-run must be 0 (every run) or a run number, got %d", *run)
	}
	if err := journalDir(*dir); err != nil {
		return err
	}
	made := newDirs(*out)
	runs, err := export.Export(ctx, *dir, *out, export.Options{Robots: robots, Deleted: *deleted, RowGroupRows: *rowGroup, Run: *run})
	if err != nil {
		made()
	}
	if errors.Is(err, export.ErrNoRuns) || errors.Is(err, journal.ErrNoRun) {
		return fmt.Errorf("%s: %w", *dir, err)
	}
	if err != nil {
		return err
	}
	var inputs, events int64
	for _, r := range runs {
		inputs += r.Inputs
		events += r.Events
		if r.Torn || r.Gap != "" || r.Damaged > 0 || r.Differs > 0 {
			fmt.Fprintf(stderr, "note: %s run %s: torn %v, damaged ranges %d, gap %q, verdicts differing from the recording %d\n",
				r.Robot, r.Run, r.Torn, r.Damaged, r.Gap, r.Differs)
		}
	}
	fmt.Fprintf(stderr, "exported %d runs, %d inputs, %d events to %s\n", len(runs), inputs, events, filepath.Join(*out, "*.parquet"))
	return nil
}
