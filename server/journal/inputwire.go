package journal

import (
	"math"
	"unicode/utf8"

	"google.golang.org/protobuf/encoding/protowire"

	pb "reckon.example/proto/reckon/v1"
)

// inputDecoder decodes the journal inputs of the two kinds that make up
// nearly all of a run, odometry and IMU headings, by hand: a replay decodes
// a million of them, and proto.Unmarshal spent 0.6 s of CPU an hour on
// them, most of it walking its tables. It gives the messages
// proto.Unmarshal gives, taken from blocks of their own (one allocation
// per message kind and block instead of six per input). Anything else
// (another kind of sample, a field it does not know, a field given twice
// where decoders merge or replace, a wire type other than the field's,
// an empty packed list) it leaves to proto.Unmarshal, so that what a
// replay sees never depends on which decoder read the bytes.
type inputDecoder struct {
	samples []pb.Sample
	odoOf   []pb.Sample_Odometry
	odos    []pb.OdometrySample
	cntOf   []pb.OdometrySample_Counts
	cnts    []pb.WheelCounts
	intBlk  []int64
	trvOf   []pb.OdometrySample_Travel
	travels []pb.WheelTravel
	floats  []float64
	stepOf  []pb.OdometrySample_Step
	steps   []pb.BodyStep
	hdgOf   []pb.Sample_Heading
	hdgs    []pb.HeadingSample
	// size is the number of messages of the next block allocated (0:
	// decodeBlock): a SampleDecoder starts small and doubles it, so that a
	// stream of a few samples holds few.
	size int
}

// decodeBlock is the number of messages of a kind allocated at once.
const decodeBlock = 256

// block returns the size of the next block to allocate.
func (d *inputDecoder) block() int {
	if d.size == 0 {
		return decodeBlock
	}
	n := d.size
	d.size = min(2*n, decodeBlock)
	return n
}

// take returns the next element of *blk, allocating a block when it is
// used up.
func take[T any](d *inputDecoder, blk *[]T) *T {
	if len(*blk) == 0 {
		*blk = make([]T, d.block())
	}
	p := &(*blk)[0]
	*blk = (*blk)[1:]
	return p
}

// decode sets in (a zero JournalInput) to the input encoded in b and
// reports whether it could; when it could not, in may hold part of the
// input, and the caller decodes b with proto.Unmarshal into a zero
// message.
func (d *inputDecoder) decode(b []byte, in *pb.JournalInput) bool {
	var seen uint32
	for len(b) > 0 {
		// Fields 2 (sample) and 4 (session id) are length-delimited, the
		// others varints.
		num, v, p, rest, ok := NextField(b, &seen, 5, 1<<2|1<<4)
		if !ok {
			return false
		}
		b = rest
		switch num {
		case 1:
			in.Sequence = v
		case 3:
			in.ArrivalUnixNs = int64(v)
		case 5:
			in.ClientSequence = v
		case 4:
			if !utf8.Valid(p) {
				return false // proto.Unmarshal's error, from proto.Unmarshal
			}
			in.SessionId = string(p)
		default:
			s := take(d, &d.samples)
			if !d.sample(p, s) {
				return false
			}
			in.Sample = s
		}
	}
	return true
}

// NextField reads the field at the start of b, a message whose fields are
// numbered 1 to maxNum (at most 31), each given at most once (seen marks those met, by
// number), the length-delimited ones marked in bytesMask by number and
// the others varints: its number, its value (v for a varint, p for a
// length-delimited field) and the bytes after it. ok is false for
// anything else (a field it does not know, a field given twice, another
// wire type, bytes that do not parse), which a hand decoder leaves to
// proto.Unmarshal.
func NextField(b []byte, seen *uint32, maxNum int, bytesMask uint32) (num int, v uint64, p, rest []byte, ok bool) {
	n0, typ, n := protowire.ConsumeTag(b)
	num = int(n0)
	if n < 0 || num < 1 || num > maxNum || *seen&(1<<num) != 0 {
		return 0, 0, nil, nil, false
	}
	*seen |= 1 << num
	b = b[n:]
	if bytesMask&(1<<num) == 0 {
		if typ != protowire.VarintType {
			return 0, 0, nil, nil, false
		}
		v, m := protowire.ConsumeVarint(b)
		if m < 0 {
			return 0, 0, nil, nil, false
		}
		return num, v, nil, b[m:], true
	}
	if typ != protowire.BytesType {
		return 0, 0, nil, nil, false
	}
	p, m := protowire.ConsumeBytes(b)
	if m < 0 {
		return 0, 0, nil, nil, false
	}
	return num, 0, p, b[m:], true
}

// sample decodes a Sample holding odometry or an IMU heading.
func (d *inputDecoder) sample(b []byte, s *pb.Sample) bool {
	num, typ, n := protowire.ConsumeTag(b)
	if n < 0 || typ != protowire.BytesType {
		return false
	}
	v, m := protowire.ConsumeBytes(b[n:])
	if m < 0 || n+m != len(b) {
		return false // not one field: left to proto.Unmarshal
	}
	switch num {
	case 1:
		o := take(d, &d.odos)
		if !d.odometry(v, o) {
			return false
		}
		w := take(d, &d.odoOf)
		w.Odometry = o
		s.Sample = w
	case 2:
		h := take(d, &d.hdgs)
		if !heading(v, h) {
			return false
		}
		w := take(d, &d.hdgOf)
		w.Heading = h
		s.Sample = w
	default:
		return false
	}
	return true
}

// odometry decodes an OdometrySample.
func (d *inputDecoder) odometry(b []byte, o *pb.OdometrySample) bool {
	var seen uint8
	for len(b) > 0 {
		num, typ, n := protowire.ConsumeTag(b)
		// Fields 3 to 5 are one oneof: only one of them, once.
		bit := num
		if num >= 3 && num <= 5 {
			bit = 3
		}
		if n < 0 || num < 1 || num > 6 || seen&(1<<bit) != 0 {
			return false
		}
		seen |= 1 << bit
		b = b[n:]
		switch num {
		case 1, 2:
			if typ != protowire.VarintType {
				return false
			}
			v, m := protowire.ConsumeVarint(b)
			if m < 0 {
				return false
			}
			b = b[m:]
			if num == 1 {
				o.StampNs = int64(v)
			} else {
				o.StartNs = int64(v)
			}
		case 6:
			if typ != protowire.Fixed64Type {
				return false
			}
			v, m := protowire.ConsumeFixed64(b)
			if m < 0 {
				return false
			}
			b = b[m:]
			h := take(d, &d.floats)
			*h = math.Float64frombits(v)
			o.ImuHeadingRad = h
		default:
			if typ != protowire.BytesType {
				return false
			}
			v, m := protowire.ConsumeBytes(b)
			if m < 0 {
				return false
			}
			b = b[m:]
			var ok bool
			switch num {
			case 3:
				ok = d.travel(v, o)
			case 4:
				ok = d.counts(v, o)
			default:
				ok = d.step(v, o)
			}
			if !ok {
				return false
			}
		}
	}
	return true
}

// packed returns the payload of a message whose only field is field 1,
// packed and not empty, as a single record, or nothing for an empty
// message.
func packed(b []byte) ([]byte, bool) {
	if len(b) == 0 {
		return nil, true
	}
	num, typ, n := protowire.ConsumeTag(b)
	if n < 0 || num != 1 || typ != protowire.BytesType {
		return nil, false
	}
	v, m := protowire.ConsumeBytes(b[n:])
	if m < 0 || n+m != len(b) || len(v) == 0 {
		return nil, false
	}
	return v, true
}

// counts decodes WheelCounts (a packed list of varints).
func (d *inputDecoder) counts(b []byte, o *pb.OdometrySample) bool {
	v, ok := packed(b)
	if !ok {
		return false
	}
	var out []int64
	if len(v) > 0 {
		if out = d.ints(v); out == nil {
			return false
		}
	}
	c := take(d, &d.cnts)
	c.Counts = out
	w := take(d, &d.cntOf)
	w.Counts = c
	o.Motion = w
	return true
}

// ints decodes a packed list of varints, nil if it does not decode.
func (d *inputDecoder) ints(v []byte) []int64 {
	k := 0
	for _, c := range v {
		if c < 0x80 {
			k++
		}
	}
	if len(d.intBlk) < k {
		d.intBlk = make([]int64, max(k, 4*d.block()))
	}
	out := d.intBlk[:0:k]
	for len(v) > 0 {
		x, m := protowire.ConsumeVarint(v)
		if m < 0 || len(out) == k {
			return nil
		}
		out = append(out, int64(x))
		v = v[m:]
	}
	if len(out) != k {
		return nil
	}
	d.intBlk = d.intBlk[k:]
	return out
}

// travel decodes WheelTravel (a packed list of doubles).
func (d *inputDecoder) travel(b []byte, o *pb.OdometrySample) bool {
	v, ok := packed(b)
	if !ok || len(v)%8 != 0 {
		return false
	}
	var out []float64
	if k := len(v) / 8; k > 0 {
		if len(d.floats) < k {
			d.floats = make([]float64, max(k, 4*d.block()))
		}
		out = d.floats[:k:k]
		d.floats = d.floats[k:]
		for i := range out {
			x, _ := protowire.ConsumeFixed64(v[8*i:])
			out[i] = math.Float64frombits(x)
		}
	}
	t := take(d, &d.travels)
	t.TravelM = out
	w := take(d, &d.trvOf)
	w.Travel = t
	o.Motion = w
	return true
}

// step decodes a BodyStep.
func (d *inputDecoder) step(b []byte, o *pb.OdometrySample) bool {
	s := take(d, &d.steps)
	if !doubles(b, &s.ForwardM, &s.LeftM, &s.TurnRad) {
		return false
	}
	w := take(d, &d.stepOf)
	w.Step = s
	o.Motion = w
	return true
}

// heading decodes a HeadingSample.
func heading(b []byte, h *pb.HeadingSample) bool {
	if len(b) == 0 {
		return true
	}
	num, typ, n := protowire.ConsumeTag(b)
	if n < 0 || num != 1 || typ != protowire.VarintType {
		return doubles(b, nil, &h.HeadingRad, &h.VarianceRad2)
	}
	v, m := protowire.ConsumeVarint(b[n:])
	if m < 0 {
		return false
	}
	h.StampNs = int64(v)
	return doubles(b[n+m:], nil, &h.HeadingRad, &h.VarianceRad2)
}

// doubles decodes fields 1 to 3 of a message whose fields are doubles (a
// nil destination: no such field), each at most once.
func doubles(b []byte, dst ...*float64) bool {
	var seen uint8
	for len(b) > 0 {
		num, typ, n := protowire.ConsumeTag(b)
		if n < 0 || num < 1 || int(num) > len(dst) || dst[num-1] == nil || typ != protowire.Fixed64Type || seen&(1<<num) != 0 {
			return false
		}
		seen |= 1 << num
		v, m := protowire.ConsumeFixed64(b[n:])
		if m < 0 {
			return false
		}
		*dst[num-1] = math.Float64frombits(v)
		b = b[n+m:]
	}
	return true
}

// SampleDecoder decodes samples of the two kinds that make up nearly all
// of a run, odometry and IMU headings, by hand, as a replay does
// (inputDecoder): the service decodes each arriving request with it, where
// proto.Unmarshal spent about 5,000 instructions a sample, a quarter of
// the service's own (callgrind, session 18), mostly walking its tables and
// setting oneofs by reflection. Its messages come from blocks it shares
// among the samples it decodes, starting at 8 messages a block. One
// goroutine at a time may use it.
type SampleDecoder struct{ d inputDecoder }

// Decode returns the sample encoded in b, or false: a sample of another
// kind, or anything proto.Unmarshal would merge, replace, keep as unknown
// or refuse, it leaves to proto.Unmarshal.
func (d *SampleDecoder) Decode(b []byte) (*pb.Sample, bool) {
	if d.d.size == 0 {
		d.d.size = 8
	}
	var got pb.Sample
	if !d.d.sample(b, &got) {
		return nil, false
	}
	s := take(&d.d, &d.d.samples)
	s.Sample = got.Sample
	return s, true
}
