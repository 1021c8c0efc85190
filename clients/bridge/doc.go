// Package bridge reads "reckon link frames", the compact binary protocol in
// which a robot's microcontroller reports its wheel encoders (and,
// optionally, its IMU heading) over a serial port or UDP, and turns them
// into odometry samples for the service. PROTOCOL.md beside this file is
// the protocol's reference for firmware authors; c/reckon_link.h is the
// encoder for the controller side.
//
// # Overview
//
// Bytes flow through three stages: a Splitter cuts the stream at 0x00
// delimiters, undoes the COBS byte stuffing and checks each frame's length
// and CRC-32C; a Sequencer drops duplicated and out-of-order frames and puts
// the controller's stamps on the robot's time base; the samples go to the
// service over one ingest session (Forward). A Decoder is the first two
// together. Because every frame carries cumulative counts, a lost,
// corrupted, duplicated or late frame costs nothing but time: the next
// frame taken covers the gap, and the samples the service sees are always
// in time order.
//
// # Frame layout
//
// A frame, before stuffing, is (all integers little-endian):
//
//	offset  size  field
//	0       1     type: 1 = wheel counts (FrameWheels)
//	1       1     flags: bit 0 = an IMU heading follows the counts; others 0
//	2       1     boot: changes at every controller boot
//	3       1     n: number of wheels, 1 to 8 (MaxWheels)
//	4       4     counter: uint32, +1 per frame sent, wrapping
//	8       8     stamp: uint64 microseconds of the controller's clock since boot
//	16      4n    counts: int32 cumulative count per wheel, robot's wheel order
//	16+4n   4     heading: float32 IMU heading, radians (only with flag bit 0)
//	end-4   4     CRC-32C of all the bytes before it
//
// It is then COBS-encoded (Cheshire and Baker, "Consistent Overhead Byte
// Stuffing", IEEE/ACM Transactions on Networking, 1999) and followed by one
// 0x00 byte, so a frame on the wire is 26 to 58 bytes long and holds no other
// zero byte. The CRC is CRC-32C (Castagnoli; Greg Cook's "Catalogue of
// parametrised CRC algorithms", CRC-32/ISCSI, check value 0xE3069283).
//
// # Time base
//
// See Sequencer: the controller's clock is the robot's time base
// (StampNs = microseconds x 1000).
package bridge
