/*
 * Host test of reckon_link.h: checks the CRC and COBS check values (on
 * stderr; exit status 1 on a mismatch), then writes the fixed sequence of
 * frames described in ../c_test.go to stdout for the Go decoder.
 *
 *   gcc -std=c99 -Wall -Wextra -pedantic -o reckon_link_test reckon_link_test.c
 *   ./reckon_link_test > frames.bin
 */
#include <stdio.h>

#include "reckon_link.h"

static int failures;

static void check_cobs(const char *name, const uint8_t *raw, size_t n, const uint8_t *want, size_t wn)
{
	uint8_t out[600];
	size_t got = reckon_link_cobs_encode(raw, n, out);
	if (got != wn || memcmp(out, want, wn) != 0) {
		fprintf(stderr, "COBS example %s: wrong encoding\n", name);
		failures++;
	}
}

int main(void)
{
	/* Greg Cook, "Catalogue of parametrised CRC algorithms", CRC-32/ISCSI: check=0xe3069283. */
	static const uint8_t check[] = "123456789";
	uint8_t raw[300], want[300];
	int32_t counts[3];
	uint8_t out[RECKON_LINK_MAX_ENCODED_LEN];
	size_t i;
	unsigned k;

	if (reckon_link_crc32c(check, 9) != 0xE3069283u) {
		fprintf(stderr, "CRC-32C check value: %08lX, want E3069283\n", (unsigned long)reckon_link_crc32c(check, 9));
		failures++;
	}
	/* COBS worked examples of Wikipedia's "Consistent Overhead Byte Stuffing" (from memory; Go's codec_test.go has the full table). */
	{
		static const uint8_t r1[] = {0x00}, w1[] = {0x01, 0x01};
		static const uint8_t r3[] = {0x00, 0x11, 0x00}, w3[] = {0x01, 0x02, 0x11, 0x01};
		static const uint8_t r4[] = {0x11, 0x22, 0x00, 0x33}, w4[] = {0x03, 0x11, 0x22, 0x02, 0x33};
		static const uint8_t r6[] = {0x11, 0x00, 0x00, 0x00}, w6[] = {0x02, 0x11, 0x01, 0x01, 0x01};
		check_cobs("1", r1, sizeof r1, w1, sizeof w1);
		check_cobs("3", r3, sizeof r3, w3, sizeof w3);
		check_cobs("4", r4, sizeof r4, w4, sizeof w4);
		check_cobs("6", r6, sizeof r6, w6, sizeof w6);
	}
	/* Example 9: 01..FF becomes FF 01..FE 02 FF. */
	for (i = 0; i < 255; i++)
		raw[i] = (uint8_t)(i + 1);
	want[0] = 0xFF;
	for (i = 0; i < 254; i++)
		want[1 + i] = (uint8_t)(i + 1);
	want[255] = 0x02;
	want[256] = 0xFF;
	check_cobs("9", raw, 255, want, 257);
	/* Example 7: 01..FE becomes FF 01..FE. */
	check_cobs("7", raw, 254, want, 255);
	if (failures)
		return 1;

	/*
	 * The sequence: 40 frames of a three-wheel cart on a constant arc, boot
	 * 3, counter from 2^32-5 (wraps), stamp every 10 ms from 2^32-0.1 s
	 * (past 32 bits), left counts from 2^31-500 (wraps int32), a heading on
	 * every other frame.
	 */
	for (k = 0; k < 40; k++) {
		struct reckon_link_frame f;
		size_t n;
		counts[0] = (int32_t)(uint32_t)(2147483148u + 185u * k);
		counts[1] = (int32_t)(215 * k);
		counts[2] = -(int32_t)(10 * k);
		f.boot = 3;
		f.counter = 4294967291u + k;
		f.stamp_us = 4294867296u + (uint64_t)10000u * k;
		f.wheels = 3;
		f.counts = counts;
		f.has_heading = (k % 2) == 0;
		f.heading_rad = (float)(0.003125 * k);
		n = reckon_link_build(out, sizeof out, &f);
		if (n == 0 || fwrite(out, 1, n, stdout) != n) {
			fprintf(stderr, "frame %u: not written\n", k);
			return 1;
		}
	}
	return fflush(stdout) == 0 ? 0 : 1;
}
