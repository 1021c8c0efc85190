package review

import (
	"bufio"
	"os"
	"strconv"
	"strings"

	"reckon.example/estimator"
)

var csvHeader = []string{"stamp_ns", "x_m", "y_m", "heading_rad", "cov_xx_m2", "cov_xy_m2", "cov_xh_m_rad", "cov_yy_m2", "cov_yh_m_rad", "cov_hh_rad2", "position95_m", "imu_offset_rad", "imu_offset_var_rad2"}

// trackRow holds the numbers of one row of a track export: 112 bytes
// where the state is 1.2 kB, for handing rows to the goroutine that
// formats them.
type trackRow struct {
	stampNs int64
	// v holds the mean (x, y, heading), the covariance (xx, xy, xh, yy,
	// yh, hh), the radius of the 95% position ellipse and, with offset
	// set, the IMU offset and its variance.
	v      [12]float64
	offset bool
}

func rowOf(stamp int64, s *estimator.State) trackRow {
	r := trackRow{stampNs: stamp, v: [12]float64{s.MeanAt(0), s.MeanAt(1), s.MeanAt(2),
		s.At(0, 0), s.At(0, 1), s.At(0, 2), s.At(1, 1), s.At(1, 2), s.At(2, 2), s.Position95()}}
	if s.Size() == 4 {
		r.v[10], r.v[11], r.offset = s.MeanAt(3), s.At(3, 3), true
	}
	return r
}

// appendRow appends one CSV row of the track (numbers only: no quoting):
// the mean with ten significant digits (a tenth of a micrometre at a
// kilometre), the covariance and the radius with seven; fixed digits format
// several times faster than the shortest exact form, and the file is
// smaller (appendG writes them as strconv would, faster still).
func appendRow(b []byte, r *trackRow) []byte {
	b = strconv.AppendInt(b, r.stampNs, 10)
	for i, v := range r.v[:10] {
		prec := 7
		if i < 3 {
			prec = 10
		}
		b = append(b, ',')
		b = appendG(b, v, prec)
	}
	b = append(b, ',')
	if r.offset {
		b = appendG(b, r.v[10], 10)
		b = append(b, ',')
		b = appendG(b, r.v[11], 7)
	} else {
		b = append(b, ',')
	}
	return append(b, '\n')
}

// trackWriter writes a track as CSV. A nil trackWriter (one that failed
// to open) does nothing.
type trackWriter struct {
	f *os.File
	w *bufio.Writer
}

func newTrackWriter(path string) (*trackWriter, error) {
	f, err := os.Create(path)
	if err != nil {
		return nil, err
	}
	tw := &trackWriter{f: f, w: bufio.NewWriterSize(f, 1<<20)}
	_, err = tw.w.WriteString(strings.Join(csvHeader, ",") + "\n")
	return tw, err
}

func (tw *trackWriter) add(stamp int64, s *estimator.State) error {
	r := rowOf(stamp, s)
	return tw.addRow(&r)
}

func (tw *trackWriter) addRow(r *trackRow) error {
	// Formatted straight into the writer's buffer.
	if tw.w.Available() < 512 {
		if err := tw.w.Flush(); err != nil {
			return err
		}
	}
	_, err := tw.w.Write(appendRow(tw.w.AvailableBuffer(), r))
	return err
}

func (tw *trackWriter) close() error {
	if tw == nil {
		return nil
	}
	err := tw.w.Flush()
	if cerr := tw.f.Close(); err == nil {
		err = cerr
	}
	return err
}

// rowWriter writes a track as CSV in a goroutine of its own: the caller
// hands it rows in batches, which come back for reuse.
type rowWriter struct {
	batch   []trackRow
	full    chan []trackRow
	pool    *batchPool[trackRow]
	written chan error
	closed  bool
	err     error
}

const rowBatch = 4096

func newRowWriter(path string) *rowWriter {
	// Four batches at most: one being filled, two sent, one being written.
	rw := &rowWriter{full: make(chan []trackRow, 2), pool: newBatchPool[trackRow](4, rowBatch), written: make(chan error, 1)}
	rw.batch, _ = rw.pool.get(nil)
	go func() {
		tw, err := newTrackWriter(path)
		for b := range rw.full {
			for i := range b {
				if err == nil {
					err = tw.addRow(&b[i])
				}
			}
			// Drained to the end after an error as well, so that the
			// sender ends.
			rw.pool.put(b)
		}
		if cerr := tw.close(); err == nil {
			err = cerr
		}
		rw.written <- err
	}()
	return rw
}

func (rw *rowWriter) addRow(r *trackRow) {
	if rw.batch = append(rw.batch, *r); len(rw.batch) == rowBatch {
		rw.full <- rw.batch
		rw.batch, _ = rw.pool.get(nil)
	}
}

// close writes the rows left, waits for the writer and returns its error;
// it may be called again.
func (rw *rowWriter) close() error {
	if !rw.closed {
		rw.closed = true
		if len(rw.batch) > 0 {
			rw.full <- rw.batch
		}
		close(rw.full)
		rw.err = <-rw.written
	}
	return rw.err
}
