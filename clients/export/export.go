// Package export writes robots' journals as Apache Parquet tables, so that
// questions across robots and runs ("which runs lost trust for more than
// two seconds", "which sensor's fixes are gated most") go to the data
// engines a team already has (DuckDB, Spark, ...): one service per robot
// stays the design (DEVELOPERS.md, "Design: Layers").
//
// # Overview
//
// Export replays each journal (journal.Replay, read only) and writes four
// files: runs.parquet (one row per run: robot, run, journal, run number,
// times, counts, the configuration), inputs.parquet (one row per input
// with its verdict, the final verdict of a held fix, NIS, reason and status
// code), poses.parquet (the fused pose with its covariance and trust after
// every input) and events.parquet. The row types RunRow, InputRow, PoseRow
// and EventRow are the schemas; their column names carry the units. A
// robot's journal is "live"; the journals set aside when a robot was
// deleted are "deleted-{unix ns}". A journal holds a run per controller
// boot: its first run's key is the journal's name, run n's from the second
// on "{journal}/{n}", each on a clock of its own (DEVELOPERS.md, "Design:
// Runs").
//
// # Invariants
//
// Memory is bounded by one row group per table plus the fixes still held
// (at most the robot's max_held, and the inputs after the oldest of them),
// whatever the length of the journals: rows are streamed. inputs and poses
// have one row per journaled input, in sequence order within a run; the
// rows of a run in events are in the order the inputs caused them.
package export

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"

	"google.golang.org/protobuf/encoding/protojson"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// Options say what Export exports. The zero value exports every robot's
// live journal only.
type Options struct {
	// Robots are the robot ids to export (empty: all).
	Robots []string
	// Deleted also exports the journals set aside when robots were deleted.
	Deleted bool
	// Run, if not 0, exports only run Run of each journal (RunRow.RunNumber;
	// a controller restart begins a run); journals with fewer runs give
	// no rows, and when no journal holds run Run the error wraps
	// journal.ErrNoRun.
	Run int64
	// RowGroupRows is the number of rows per Parquet row group (0: 65536).
	RowGroupRows int
}

// ErrNoRuns is returned when the directory holds no journal of the robots
// asked for; it wraps journal.ErrNoJournal.
var ErrNoRuns = fmt.Errorf("%w to export", journal.ErrNoJournal)

// Export replays the journals in dir and writes the four tables into out,
// which it creates if needed; it returns the rows of runs.parquet. A
// journal that cannot be read, or ctx ending, stops the export and its
// files are removed; the tables of an earlier export in out are replaced
// only by a whole export.
func Export(ctx context.Context, dir, out string, opt Options) ([]RunRow, error) {
	runs, err := Runs(dir, opt.Deleted)
	if err != nil {
		return nil, err
	}
	runs, err = pick(runs, opt.Robots)
	if err != nil {
		return nil, err
	}
	if err := os.MkdirAll(out, 0o755); err != nil {
		return nil, err
	}
	group := opt.RowGroupRows
	if group <= 0 {
		group = 1 << 16
	}
	t, err := openTables(out, group)
	if err != nil {
		return nil, err
	}
	var rows []RunRow
	for _, r := range runs {
		got, err := exportRun(ctx, t, dir, r, opt.Run)
		for i := 0; err == nil && i < len(got); i++ {
			err = t.runs.add(got[i])
		}
		if err != nil {
			t.abandon()
			return nil, fmt.Errorf("%s, journal %s: %w", r.Robot, r.ID, err)
		}
		rows = append(rows, got...)
	}
	if len(rows) == 0 && opt.Run > 0 {
		// Empty tables with no word said that the journals hold no
		// inputs, which they may.
		t.abandon()
		return nil, fmt.Errorf("%w: no journal holds a run %d", journal.ErrNoRun, opt.Run)
	}
	return rows, t.close()
}

// pick keeps the runs of the robots asked for; a robot without a journal is
// an error.
func pick(runs []Run, robots []string) ([]Run, error) {
	if len(robots) == 0 {
		if len(runs) == 0 {
			return nil, ErrNoRuns
		}
		return runs, nil
	}
	var out []Run
	for _, id := range robots {
		n := len(out)
		for _, r := range runs {
			if r.Robot == id {
				out = append(out, r)
			}
		}
		if len(out) == n {
			return nil, fmt.Errorf("%w for robot %q", ErrNoRuns, id)
		}
	}
	return out, nil
}

// exportRun replays one journal into the tables and returns the rows of
// its runs.
func exportRun(ctx context.Context, t *tables, dir string, r Run, only int64) ([]RunRow, error) {
	x := &runExport{ctx: ctx, t: t, only: only, row: RunRow{Robot: r.Robot, Run: r.ID, Journal: r.ID, RunNumber: 1, Deleted: r.ID != liveRun}}
	if r.DeleteTimeUnixNs != 0 {
		x.row.DeleteTimeUnixNs = &r.DeleteTimeUnixNs
	}
	var gap error
	fr, scan, err := journal.Replay(filepath.Clean(dir), r.Robot, journal.ReplayOptions{ReadOnly: true, FS: r.fs(),
		Opened: func(fr *fusion.Robot) error { x.cfg = fr.Config(); return nil },
		Input:  x.input,
		Gap: func(err error) error {
			if gap == nil {
				gap = err
			}
			return nil
		}})
	// A gap is gone past (and noted by Gap) only once the journal opened a
	// robot: without one (no segment left) there is nothing to export.
	if err != nil && (fr == nil || !errors.Is(err, journal.ErrGap)) {
		return nil, err
	}
	if err := x.flushInputs(true); err != nil {
		return nil, err
	}
	var rows []RunRow
	for _, row := range append(x.done, x.row) {
		if x.keeps(row.RunNumber) {
			rows = append(rows, row)
		}
	}
	for i := range rows {
		if gap != nil {
			rows[i].Gap = gap.Error()
		}
		rows[i].Torn = scan.Torn != nil
		rows[i].Damaged = int32(len(scan.Damage))
		if err := configure(&rows[i], scan.Opening, x.cfg); err != nil {
			return nil, err
		}
	}
	return rows, nil
}

// configure fills a runs row's configuration summary from the opening
// record and the robot's configuration with its defaults filled in.
func configure(row *RunRow, op *pb.JournalOpening, cfg fusion.Config) error {
	js, err := protojson.MarshalOptions{UseProtoNames: true}.Marshal(op.GetConfig())
	if err != nil {
		return err
	}
	row.CreateTimeUnixNs = op.GetCreateTimeUnixNs()
	for _, l := range fusion.IMUModeLabels() {
		if l.Value == cfg.IMU {
			row.IMUMode = l.Name
		}
	}
	row.Wheels, row.Landmarks = int32(len(cfg.Wheels)), int32(len(cfg.Landmarks))
	row.GateProbability, row.WindowNs = cfg.GateProbability, cfg.WindowNs
	row.MaxPosition95M, row.MaxHeadingStdRad = cfg.Trust.MaxPosition95M, cfg.Trust.MaxHeadingStdRad
	row.ConfigJSON = string(js)
	return nil
}

// labelOf returns the label of the row of table with wire number n, or ""
// (an unset enum).
func labelOf[T comparable](table []fusion.Label[T], n int32) string {
	for _, l := range table {
		if l.Proto == n {
			return l.Name
		}
	}
	return ""
}
