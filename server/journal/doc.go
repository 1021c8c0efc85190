// Package journal stores the per-robot record of a run: the configuration,
// every input in arrival order with the verdict it got, fused poses and
// snapshots, in segment files of length-, checksum- and protobuf-framed
// records (DEVELOPERS.md, "Design: Journal format").
//
// It works on the directory it is given through FS, the operating
// system's file system unless a test passes another (package faultfs).
// Lock keeps a second process out of a journal directory. Writer creates
// segments atomically (temporary file, fsync, rename, directory fsync),
// appends entries with one write per Flush, reports how many of them are
// complete when a write fails, rotates, and keeps a manifest naming the
// newest segment and recording each sealed one (its size, last input and
// last snapshot). Read scans a robot's segments in order and hands what it
// finds to a Visitor: damaged bytes are copied aside and reported
// (DamageError), the scan resynchronises at the next valid frame, and
// missing inputs or segments are reported (ErrGap); given a Snapshot
// visitor it starts at the last snapshot the manifest records and checks
// the older segments only by their sizes, and Verify reads those later.
// Replay, the one replay
// of a journal (restore, reckon replay and reckon review use it), runs the
// inputs through a new fusion robot as the service took them, decoding in
// a goroutine of its own while the caller's goroutine replays; it can
// start from the last snapshot, check every recorded output bit for bit,
// or use another configuration. ValidID is the robot id check that keeps
// file names safe; resource names ("robots/{robot}") belong to package
// server.
package journal
