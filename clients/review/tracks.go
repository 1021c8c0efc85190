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

// rowWriter writes a track as CSV while the caller goes on: the caller
// hands it rows in batches, which two goroutines format in turns (the
// formatting is most of the cost, and the walk that hands the rows over
// leaves room on both cores) and a third writes in order. The batches and
// the formatted bytes come back for reuse.
type rowWriter struct {
	batch   []trackRow
	turn    int
	work    [2]chan []trackRow
	pool    *batchPool[trackRow]
	bufs    chan []byte
	written chan error
	closed  bool
	err     error
}

const rowBatch = 2048

func newRowWriter(path string) *rowWriter {
	// Six batches at most: one being filled, one queued and one being
	// formatted for each formatter; six buffers of formatted rows (about
	// 0.45 MB each), one queued and one being written for each.
	rw := &rowWriter{pool: newBatchPool[trackRow](6, rowBatch), bufs: make(chan []byte, 6), written: make(chan error, 1)}
	rw.batch, _ = rw.pool.get(nil)
	var out [2]chan []byte
	for i := range rw.work {
		rw.work[i], out[i] = make(chan []trackRow, 1), make(chan []byte, 1)
		go func() {
			defer close(out[i])
			for b := range rw.work[i] {
				var buf []byte
				select {
				case buf = <-rw.bufs:
				default:
				}
				buf = buf[:0]
				for j := range b {
					buf = appendRow(buf, &b[j])
				}
				rw.pool.put(b)
				out[i] <- buf
			}
		}()
	}
	go func() {
		f, err := os.Create(path)
		if err == nil {
			_, err = f.WriteString(strings.Join(csvHeader, ",") + "\n")
		}
		// The formatted batches in the order handed over: they alternate
		// between the formatters. Drained to the end after an error as
		// well, so that the formatters and the sender end.
		for i := 0; ; i++ {
			buf, ok := <-out[i%2]
			if !ok {
				break
			}
			if err == nil {
				_, err = f.Write(buf)
			}
			select {
			case rw.bufs <- buf:
			default:
			}
		}
		if f != nil {
			if cerr := f.Close(); err == nil {
				err = cerr
			}
		}
		rw.written <- err
	}()
	return rw
}

func (rw *rowWriter) addRow(r *trackRow) {
	if rw.batch = append(rw.batch, *r); len(rw.batch) == rowBatch {
		rw.hand()
		rw.batch, _ = rw.pool.get(nil)
	}
}

// hand gives the batch being filled to the formatter whose turn it is.
func (rw *rowWriter) hand() {
	rw.work[rw.turn%2] <- rw.batch
	rw.turn++
	rw.batch = nil
}

// close writes the rows left, waits for the writer and returns its error;
// it may be called again.
func (rw *rowWriter) close() error {
	if !rw.closed {
		rw.closed = true
		if len(rw.batch) > 0 {
			rw.hand()
		}
		close(rw.work[0])
		close(rw.work[1])
		rw.err = <-rw.written
	}
	return rw.err
}
