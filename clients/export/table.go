package export

import (
	"errors"
	"os"
	"path/filepath"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/compress/snappy"
)

// batchRows is how many rows a table hands the Parquet writer at once.
const batchRows = 1024

// table streams rows of type T to one Parquet file, a row group at a time,
// so that memory stays bounded by the row group however long the run.
type table[T any] struct {
	path    string   // the file's name once the export is done
	f       *os.File // a temporary file beside it until then
	w       *parquet.GenericWriter[T]
	batch   []T
	inGroup int // rows written since the last row group ended
	group   int // rows per row group
	rows    int64
}

// newTable creates a temporary file beside path, which done renames to
// path.
func newTable[T any](path string, group int) (*table[T], error) {
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return nil, err
	}
	w := parquet.NewGenericWriter[T](f, parquet.Compression(&snappy.Codec{}),
		parquet.CreatedBy("reckon export", "", ""))
	return &table[T]{path: path, f: f, w: w, batch: make([]T, 0, batchRows), group: group}, nil
}

// add appends a row.
func (t *table[T]) add(row T) error {
	t.batch = append(t.batch, row)
	if len(t.batch) < batchRows {
		return nil
	}
	return t.write()
}

// write hands the batch to the writer and ends the row group when it is
// full.
func (t *table[T]) write() error {
	if len(t.batch) == 0 {
		return nil
	}
	if _, err := t.w.Write(t.batch); err != nil {
		return err
	}
	t.rows += int64(len(t.batch))
	t.inGroup += len(t.batch)
	clear(t.batch) // drop references (strings, lists) to rows written
	t.batch = t.batch[:0]
	if t.inGroup >= t.group {
		t.inGroup = 0
		return t.w.Flush()
	}
	return nil
}

// close writes what is left and the footer, and closes the file.
func (t *table[T]) close() error {
	err := t.write()
	if err == nil {
		err = t.w.Close()
	}
	if cerr := t.f.Close(); err == nil {
		err = cerr
	}
	return err
}

// done gives the closed file its name.
func (t *table[T]) done() error {
	if err := os.Chmod(t.f.Name(), 0o644); err != nil {
		return err
	}
	return os.Rename(t.f.Name(), t.path)
}

// abandon closes and removes the file after a failure.
func (t *table[T]) abandon() {
	t.f.Close()
	os.Remove(t.f.Name())
}

// tables are the four files of an export.
type tables struct {
	runs   *table[RunRow]
	inputs *table[InputRow]
	poses  *table[PoseRow]
	events *table[EventRow]
}

// The file names of an export, in its output directory.
const (
	RunsFile   = "runs.parquet"
	InputsFile = "inputs.parquet"
	PosesFile  = "poses.parquet"
	EventsFile = "events.parquet"
)

// openTables creates the four files in dir.
func openTables(dir string, group int) (*tables, error) {
	var t tables
	var err error
	if t.runs, err = newTable[RunRow](filepath.Join(dir, RunsFile), group); err != nil {
		return nil, err
	}
	if t.inputs, err = newTable[InputRow](filepath.Join(dir, InputsFile), group); err != nil {
		t.runs.abandon()
		return nil, err
	}
	if t.poses, err = newTable[PoseRow](filepath.Join(dir, PosesFile), group); err != nil {
		t.runs.abandon()
		t.inputs.abandon()
		return nil, err
	}
	if t.events, err = newTable[EventRow](filepath.Join(dir, EventsFile), group); err != nil {
		t.runs.abandon()
		t.inputs.abandon()
		t.poses.abandon()
		return nil, err
	}
	return &t, nil
}

// close finishes the four files and gives them their names, replacing
// those of an earlier export; after a failure it removes them all, and an
// earlier export's files stay as they were.
func (t *tables) close() error {
	err := errors.Join(t.runs.close(), t.inputs.close(), t.poses.close(), t.events.close())
	if err != nil {
		t.abandon()
		return err
	}
	return errors.Join(t.runs.done(), t.inputs.done(), t.poses.done(), t.events.done())
}

// abandon removes the four files.
func (t *tables) abandon() {
	t.runs.abandon()
	t.inputs.abandon()
	t.poses.abandon()
	t.events.abandon()
}
