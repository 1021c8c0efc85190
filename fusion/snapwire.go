package fusion

import (
	"encoding/binary"
	"fmt"
	"math"

	"google.golang.org/protobuf/encoding/protowire"
	"reckon.example/estimator"
)

// The snapshot is written and read by hand in the protocol buffer wire
// format, against the message reckon.v1.RobotSnapshot of
// proto/reckon/v1/journal.proto: package fusion does not depend on the
// generated code, and a test in server/convert decodes these bytes with it.

// wenc appends fields to a message.
type wenc struct{ b []byte }

func (e *wenc) uint(n protowire.Number, v uint64) {
	e.b = protowire.AppendTag(e.b, n, protowire.VarintType)
	e.b = protowire.AppendVarint(e.b, v)
}

func (e *wenc) int(n protowire.Number, v int64) { e.uint(n, uint64(v)) }

func (e *wenc) bool(n protowire.Number, v bool) { e.uint(n, protowire.EncodeBool(v)) }

func (e *wenc) double(n protowire.Number, v float64) {
	e.b = protowire.AppendTag(e.b, n, protowire.Fixed64Type)
	e.b = protowire.AppendFixed64(e.b, math.Float64bits(v))
}

func (e *wenc) string(n protowire.Number, s string) {
	e.b = protowire.AppendTag(e.b, n, protowire.BytesType)
	e.b = protowire.AppendString(e.b, s)
}

// doubles writes a packed repeated double (nothing for none).
func (e *wenc) doubles(n protowire.Number, vs []float64) {
	if len(vs) == 0 {
		return
	}
	e.b = protowire.AppendTag(e.b, n, protowire.BytesType)
	e.b = protowire.AppendVarint(e.b, uint64(8*len(vs)))
	for _, v := range vs {
		e.b = protowire.AppendFixed64(e.b, math.Float64bits(v))
	}
}

// ints writes a packed repeated int64 (nothing for none).
func (e *wenc) ints(n protowire.Number, vs []int64) {
	if len(vs) == 0 {
		return
	}
	size := 0
	for _, v := range vs {
		size += protowire.SizeVarint(uint64(v))
	}
	e.b = protowire.AppendTag(e.b, n, protowire.BytesType)
	e.b = protowire.AppendVarint(e.b, uint64(size))
	for _, v := range vs {
		e.b = protowire.AppendVarint(e.b, uint64(v))
	}
}

// message writes a nested message that body fills.
func (e *wenc) message(n protowire.Number, body func(*wenc)) {
	var sub wenc
	body(&sub)
	e.b = protowire.AppendTag(e.b, n, protowire.BytesType)
	e.b = protowire.AppendBytes(e.b, sub.b)
}

// wdec reads the fields of one message; the first error sticks.
type wdec struct {
	b   []byte
	err error
	// angles is the robot's set of angular states, for the estimates.
	angles uint16
	// version is the snapshot's (field 1, which comes first), for the
	// estimates' errors-in-variables moments (decEIV).
	version uint64
	// gyroTurnMax is the largest IMU turn of a gyro scale an estimate
	// may hold (Robot.gyroTurnMax); 0 refuses any but 0.
	gyroTurnMax float64
	// The field just read.
	typ protowire.Type
	v   uint64 // varint or fixed64
	raw []byte // bytes
}

func (d *wdec) fail(format string, args ...any) {
	if d.err == nil {
		d.err = fmt.Errorf("%w: "+format, append([]any{ErrSnapshot}, args...)...)
	}
}

// next reads the next field and returns its number, or false at the end or
// on an error.
func (d *wdec) next() (protowire.Number, bool) {
	if d.err != nil || len(d.b) == 0 {
		return 0, false
	}
	num, typ, n := protowire.ConsumeTag(d.b)
	if n < 0 {
		d.fail("field tag: %v", protowire.ParseError(n))
		return 0, false
	}
	d.b, d.typ = d.b[n:], typ
	switch typ {
	case protowire.VarintType:
		d.v, n = protowire.ConsumeVarint(d.b)
	case protowire.Fixed64Type:
		d.v, n = protowire.ConsumeFixed64(d.b)
	case protowire.BytesType:
		d.raw, n = protowire.ConsumeBytes(d.b)
	default:
		n = protowire.ConsumeFieldValue(num, typ, d.b)
	}
	if n < 0 {
		d.fail("field %d: %v", num, protowire.ParseError(n))
		return 0, false
	}
	d.b = d.b[n:]
	return num, true
}

func (d *wdec) want(num protowire.Number, t protowire.Type) bool {
	if d.typ != t {
		d.fail("field %d has wire type %d, want %d", num, d.typ, t)
		return false
	}
	return true
}

func (d *wdec) uint(num protowire.Number) uint64 {
	if !d.want(num, protowire.VarintType) {
		return 0
	}
	return d.v
}

func (d *wdec) int(num protowire.Number) int64 { return int64(d.uint(num)) }

// uint32 reads a uint32 field: a value beyond 32 bits is damage.
func (d *wdec) uint32(num protowire.Number) uint32 {
	v := d.uint(num)
	if v > math.MaxUint32 {
		d.fail("field %d: %d does not fit in 32 bits", num, v)
		return 0
	}
	return uint32(v)
}

func (d *wdec) bool(num protowire.Number) bool { return d.uint(num) != 0 }

func (d *wdec) double(num protowire.Number) float64 {
	if !d.want(num, protowire.Fixed64Type) {
		return 0
	}
	return math.Float64frombits(d.v)
}

func (d *wdec) string(num protowire.Number) string {
	if !d.want(num, protowire.BytesType) {
		return ""
	}
	return string(d.raw)
}

// doubles reads a packed repeated double into dst, which must hold exactly
// as many values.
func (d *wdec) doubles(num protowire.Number, dst []float64) {
	if !d.want(num, protowire.BytesType) {
		return
	}
	if len(d.raw) != 8*len(dst) {
		d.fail("field %d holds %d bytes, want %d doubles", num, len(d.raw), len(dst))
		return
	}
	for i := range dst {
		dst[i] = math.Float64frombits(binary.LittleEndian.Uint64(d.raw[8*i:]))
	}
}

// doubleSlice reads a packed repeated double of any length.
func (d *wdec) doubleSlice(num protowire.Number) []float64 {
	if !d.want(num, protowire.BytesType) {
		return nil
	}
	if len(d.raw)%8 != 0 {
		d.fail("field %d holds %d bytes, not whole doubles", num, len(d.raw))
		return nil
	}
	out := make([]float64, len(d.raw)/8)
	d.doubles(num, out)
	return out
}

// intSlice reads a packed repeated int64.
func (d *wdec) intSlice(num protowire.Number) []int64 {
	if !d.want(num, protowire.BytesType) {
		return nil
	}
	var out []int64
	for b := d.raw; len(b) > 0; {
		v, n := protowire.ConsumeVarint(b)
		if n < 0 {
			d.fail("field %d: %v", num, protowire.ParseError(n))
			return nil
		}
		out, b = append(out, int64(v)), b[n:]
	}
	return out
}

// message reads a nested message with body.
func (d *wdec) message(num protowire.Number, body func(*wdec)) {
	if !d.want(num, protowire.BytesType) {
		return
	}
	sub := wdec{b: d.raw, angles: d.angles, version: d.version, gyroTurnMax: d.gyroTurnMax}
	body(&sub)
	if sub.err != nil && d.err == nil {
		d.err = sub.err
	}
}

// pose writes a pose as a packed repeated double (x, y, heading).
func (e *wenc) pose(n protowire.Number, p estimator.Pose) {
	v := [3]float64{p.X, p.Y, p.Heading}
	e.doubles(n, v[:])
}

// pose reads a pose written by wenc.pose.
func (d *wdec) pose(num protowire.Number) estimator.Pose {
	var v [3]float64
	d.doubles(num, v[:])
	return estimator.Pose{X: v[0], Y: v[1], Heading: v[2]}
}

// step reads a body step (forward, left, turn) as a packed repeated double.
func (d *wdec) step(num protowire.Number) estimator.Step {
	var v [3]float64
	d.doubles(num, v[:])
	return estimator.Step{ForwardM: v[0], LeftM: v[1], TurnRad: v[2]}
}
