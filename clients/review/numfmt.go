package review

import (
	"math"
	"strconv"
)

// pow10f holds the powers of ten that float64 holds exactly.
var pow10f = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11,
	1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// pow10u holds the powers of ten up to 10^10.
var pow10u = [...]uint64{1, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10}

// appendG appends v as strconv.AppendFloat(b, v, 'g', prec, 64) does, byte
// for byte, for prec from 1 to 10, at less than half its cost: v is
// scaled to prec digits before the point by one exact power of ten, with a
// single rounding, so that the digits are those of the exact value's
// correct rounding unless the scaled value lies within 1e-5 of a half,
// where (as for zeros, NaNs, infinities and magnitudes outside 1e-12 to
// 1e21) strconv formats it. The exports' numbers take most of the time of
// writing them.
func appendG(b []byte, v float64, prec int) []byte {
	a := math.Abs(v)
	if !(a >= 1e-12 && a < 1e21) || prec < 1 || prec > 10 {
		return strconv.AppendFloat(b, v, 'g', prec, 64)
	}
	// a is in [2^(e2-1), 2^e2); floor(log10 a) is e10 or e10+1 (78913 /
	// 2^18 is log10(2) to 3e-6, exact enough for these exponents).
	e2 := int(math.Float64bits(a)>>52&0x7ff) - 1022
	e10 := ((e2 - 1) * 78913) >> 18
	s, ok := scale10(a, prec-1-e10)
	if ok && s >= pow10f[prec] {
		e10++
		s, ok = scale10(a, prec-1-e10)
	}
	if !ok || s < pow10f[prec-1] || s >= pow10f[prec] {
		return strconv.AppendFloat(b, v, 'g', prec, 64)
	}
	d := uint64(s)       // the integer part: s is positive
	fr := s - float64(d) // exact: s < 2^53
	if fr > 0.5-1e-5 && fr < 0.5+1e-5 {
		return strconv.AppendFloat(b, v, 'g', prec, 64)
	}
	if fr > 0.5 {
		d++
	}
	if d == pow10u[prec] {
		d = pow10u[prec-1]
		e10++
	}
	// The digits, their trailing zeros trimmed: nd of them, the point
	// after dp.
	var digs [10]byte
	i := prec
	for ; i >= 2; i -= 2 {
		q := d / 100
		r := d - q*100
		digs[i-2], digs[i-1] = digitPairs[2*r], digitPairs[2*r+1]
		d = q
	}
	if i == 1 {
		digs[0] = byte('0' + d)
	}
	nd := prec
	for nd > 1 && digs[nd-1] == '0' {
		nd--
	}
	dp := e10 + 1
	if v < 0 {
		b = append(b, '-')
	}
	// strconv's %g: the e form for exponents below -4 or at least the
	// precision (the digits' count when they end before the point).
	eprec := prec
	if eprec > nd && nd >= dp {
		eprec = nd
	}
	if e10 < -4 || e10 >= eprec {
		b = append(b, digs[0])
		if nd > 1 {
			b = append(b, '.')
			b = append(b, digs[1:nd]...)
		}
		b = append(b, 'e')
		x := e10
		if x < 0 {
			b = append(b, '-')
			x = -x
		} else {
			b = append(b, '+')
		}
		if x < 100 {
			return append(b, byte('0'+x/10), byte('0'+x%10))
		}
		return append(b, byte('0'+x/100), byte('0'+x/10%10), byte('0'+x%10))
	}
	p := prec
	if p > dp {
		p = nd
	}
	if dp > 0 {
		m := min(nd, dp)
		b = append(b, digs[:m]...)
		for ; m < dp; m++ {
			b = append(b, '0')
		}
	} else {
		b = append(b, '0')
	}
	if f := p - dp; f > 0 {
		b = append(b, '.')
		for i := 0; i < f; i++ {
			ch := byte('0')
			if j := dp + i; j >= 0 && j < nd {
				ch = digs[j]
			}
			b = append(b, ch)
		}
	}
	return b
}

// digitPairs holds "00" to "99".
const digitPairs = "00010203040506070809101112131415161718192021222324252627282930313233343536373839404142434445464748495051525354555657585960616263646566676869707172737475767778798081828384858687888990919293949596979899"

// scale10 returns a * 10^k with one rounding, for |k| <= 22.
func scale10(a float64, k int) (float64, bool) {
	switch {
	case k >= 0 && k < len(pow10f):
		return a * pow10f[k], true
	case k < 0 && -k < len(pow10f):
		return a / pow10f[-k], true
	}
	return 0, false
}
