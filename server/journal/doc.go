// Package journal stores the per-robot record of a run: the configuration,
// every input in arrival order with the verdict it got, fused poses and
// snapshots, in segment files of length-, checksum- and protobuf-framed
// records (DEVELOPERS.md, "Design: Journal format").
//
// It writes and reads files in the directory it is given. Read scans a
// robot's segments in order and hands what it finds to a Visitor; Writer
// appends, rotates and syncs. Replay, the one replay of a journal (restore,
// reckon replay and reckon review use it), runs the inputs through a new
// fusion robot as the service took them, decoding in a goroutine of its own
// while the caller's goroutine replays; it can start from the last
// snapshot, check every recorded output bit for bit, or use another
// configuration. ValidID is the robot id check that keeps file names safe;
// resource names ("robots/{robot}") belong to package server.
package journal
