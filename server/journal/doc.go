// Package journal stores the per-robot record of a run: the configuration,
// every input in arrival order with the verdict it got, fused poses and
// snapshots, in segment files of length-, checksum- and protobuf-framed
// records (DEVELOPERS.md, "Design: Journal format").
//
// It writes and reads files in the directory it is given; it starts no
// goroutines. Read scans a robot's segments in order and hands what it finds
// to a Visitor; Writer appends, rotates and syncs.
package journal
