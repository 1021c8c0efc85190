/*
 * reckon_link.h: reference encoder of reckon link frames for the
 * controller side (see ../PROTOCOL.md for the byte layout).
 *
 * Portable C99, header only: static inline functions, no malloc, no
 * global state. The caller owns every buffer. It assumes an IEEE 754
 * binary32 float (true of every compiler for the usual microcontrollers).
 *
 *   int32_t counts[3] = {left, right, lateral};
 *   struct reckon_link_frame f = {0};
 *   uint8_t out[RECKON_LINK_MAX_ENCODED_LEN];
 *   f.boot = boot_id; f.counter = frame_counter++; f.stamp_us = micros();
 *   f.wheels = 3; f.counts = counts;
 *   f.has_heading = 1; f.heading_rad = imu_heading();
 *   size_t n = reckon_link_build(out, sizeof out, &f);
 *   if (n) uart_write(out, n);
 */
#ifndef RECKON_LINK_H
#define RECKON_LINK_H

#include <stddef.h>
#include <stdint.h>
#include <string.h>

#define RECKON_LINK_FRAME_WHEELS 1u /* frame type: wheel counts */
#define RECKON_LINK_FLAG_HEADING 1u /* flag bit: an IMU heading follows the counts */
#define RECKON_LINK_MAX_WHEELS 8
#define RECKON_LINK_HEADER_LEN 16
/* Longest frame before COBS: header, counts, heading, CRC. */
#define RECKON_LINK_MAX_FRAME_LEN (RECKON_LINK_HEADER_LEN + 4 * RECKON_LINK_MAX_WHEELS + 4 + 4)
/* Longest frame on the wire: COBS adds one byte below 254 bytes, then the 0x00 delimiter. */
#define RECKON_LINK_MAX_ENCODED_LEN (RECKON_LINK_MAX_FRAME_LEN + 2)

typedef char reckon_link_float_is_32_bits[sizeof(float) == 4 ? 1 : -1];

/* One frame; see PROTOCOL.md for what each field means. */
struct reckon_link_frame {
	uint8_t boot;          /* changes at every controller boot */
	uint32_t counter;      /* +1 for every frame sent, wrapping */
	uint64_t stamp_us;     /* controller clock when the wheels were read, microseconds since boot */
	uint8_t wheels;        /* number of entries in counts, 1 to RECKON_LINK_MAX_WHEELS */
	const int32_t *counts; /* cumulative encoder counts, in the robot's wheel order */
	int has_heading;       /* non-zero: heading_rad is sent */
	float heading_rad;     /* IMU heading, radians, counter-clockwise */
};

/*
 * reckon_link_crc32c returns the CRC-32C (Castagnoli) of p[0..n): polynomial
 * 0x1EDC6F41 (reflected 0x82F63B78), initial value and final XOR 0xFFFFFFFF,
 * reflected input and output. Check value for "123456789": 0xE3069283
 * (Greg Cook, "Catalogue of parametrised CRC algorithms", CRC-32/ISCSI).
 * Bitwise, without a table, to save flash; a controller with hardware CRC-32C
 * may use it instead.
 */
static inline uint32_t reckon_link_crc32c(const uint8_t *p, size_t n)
{
	uint32_t crc = 0xFFFFFFFFu;
	while (n--) {
		int k;
		crc ^= *p++;
		for (k = 0; k < 8; k++)
			crc = (crc >> 1) ^ (0x82F63B78u & (0u - (crc & 1u)));
	}
	return ~crc;
}

/*
 * reckon_link_cobs_encode writes the COBS encoding of src[0..n) to dst,
 * which must hold n + n/254 + 1 bytes, and returns its length; no zero byte
 * is written and no delimiter. Cheshire and Baker, "Consistent Overhead Byte
 * Stuffing", IEEE/ACM Transactions on Networking 7(2), 1999.
 */
static inline size_t reckon_link_cobs_encode(const uint8_t *src, size_t n, uint8_t *dst)
{
	size_t code = 0, out = 1, i;
	dst[0] = 1;
	for (i = 0; i < n; i++) {
		if (src[i] == 0) {
			code = out++;
			dst[code] = 1;
			continue;
		}
		dst[out++] = src[i];
		if (++dst[code] == 0xFF && i + 1 < n) {
			code = out++;
			dst[code] = 1;
		}
	}
	return out;
}

static inline void reckon_link_put_u32(uint8_t *p, uint32_t v)
{
	p[0] = (uint8_t)v;
	p[1] = (uint8_t)(v >> 8);
	p[2] = (uint8_t)(v >> 16);
	p[3] = (uint8_t)(v >> 24);
}

/*
 * reckon_link_raw writes frame f with its CRC, before COBS, to raw, which
 * must hold RECKON_LINK_MAX_FRAME_LEN bytes, and returns its length, or 0
 * if f has no wheels or more than RECKON_LINK_MAX_WHEELS.
 */
static inline size_t reckon_link_raw(uint8_t *raw, const struct reckon_link_frame *f)
{
	size_t n = RECKON_LINK_HEADER_LEN;
	uint8_t i;
	if (f->wheels == 0 || f->wheels > RECKON_LINK_MAX_WHEELS)
		return 0;
	raw[0] = RECKON_LINK_FRAME_WHEELS;
	raw[1] = f->has_heading ? RECKON_LINK_FLAG_HEADING : 0u;
	raw[2] = f->boot;
	raw[3] = f->wheels;
	reckon_link_put_u32(raw + 4, f->counter);
	reckon_link_put_u32(raw + 8, (uint32_t)f->stamp_us);
	reckon_link_put_u32(raw + 12, (uint32_t)(f->stamp_us >> 32));
	for (i = 0; i < f->wheels; i++, n += 4)
		reckon_link_put_u32(raw + n, (uint32_t)f->counts[i]);
	if (f->has_heading) {
		uint32_t bits;
		memcpy(&bits, &f->heading_rad, sizeof bits);
		reckon_link_put_u32(raw + n, bits);
		n += 4;
	}
	reckon_link_put_u32(raw + n, reckon_link_crc32c(raw, n));
	return n + 4;
}

/*
 * reckon_link_build writes frame f, COBS-encoded and followed by its 0x00
 * delimiter, to out (cap bytes; RECKON_LINK_MAX_ENCODED_LEN always
 * suffices) and returns the number of bytes to send, or 0 if f is not valid
 * or out is too small.
 */
static inline size_t reckon_link_build(uint8_t *out, size_t cap, const struct reckon_link_frame *f)
{
	uint8_t raw[RECKON_LINK_MAX_FRAME_LEN];
	size_t n = reckon_link_raw(raw, f);
	if (n == 0 || cap < n + 2)
		return 0;
	n = reckon_link_cobs_encode(raw, n, out);
	out[n] = 0;
	return n + 1;
}

#endif /* RECKON_LINK_H */
