package bridge

import "errors"

// ErrCOBS reports a byte sequence that is not valid Consistent Overhead
// Byte Stuffing: a zero byte inside it, or a code byte pointing past its
// end.
var ErrCOBS = errors.New("bridge: malformed COBS block")

// AppendCOBS appends the COBS encoding of src to dst and returns the
// extended slice; the result holds no zero byte and no delimiter. The
// encoding is that of Cheshire and Baker, "Consistent Overhead Byte
// Stuffing", IEEE/ACM Transactions on Networking 7(2), 1999, section 3: each
// block is a code byte n (1 to 255) followed by n-1 non-zero bytes; a block
// with n < 255 stands for its bytes followed by a zero, except the last,
// whose zero is implied by the end of the frame. It adds at most one byte
// per 254 bytes of src, and one byte for an src shorter than 254.
func AppendCOBS(dst, src []byte) []byte {
	code := len(dst)
	dst = append(dst, 1)
	for i, b := range src {
		if b == 0 {
			code = len(dst)
			dst = append(dst, 1)
			continue
		}
		dst = append(dst, b)
		dst[code]++
		if dst[code] == 0xFF && i+1 < len(src) {
			code = len(dst)
			dst = append(dst, 1)
		}
	}
	return dst
}

// AppendUnCOBS appends the decoding of src, one COBS-encoded frame without
// its delimiter, to dst. It returns ErrCOBS if src holds a zero byte or a
// block runs past its end; dst is then returned with whatever was decoded.
func AppendUnCOBS(dst, src []byte) ([]byte, error) {
	for i := 0; i < len(src); {
		n := int(src[i])
		if n == 0 {
			return dst, ErrCOBS
		}
		i++
		if i+n-1 > len(src) {
			return dst, ErrCOBS
		}
		for _, b := range src[i : i+n-1] {
			if b == 0 {
				return dst, ErrCOBS
			}
			dst = append(dst, b)
		}
		i += n - 1
		if n != 0xFF && i < len(src) {
			dst = append(dst, 0)
		}
	}
	return dst, nil
}
