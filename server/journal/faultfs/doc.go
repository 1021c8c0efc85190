// Package faultfs holds two test implementations of journal.FS, in the
// manner of cockroachdb/pebble's vfs/errorfs and crashable vfs.MemFS and
// of LevelDB's fault-injection test environment:
//
//   - FS wraps another journal.FS and fails chosen operations (by kind,
//     path and count) with a chosen error, ENOSPC or EIO for instance; a
//     failed write or copy can write part of its bytes first (a short
//     write). It counts the operations, and the bytes read.
//   - MemFS is an in-memory file system that can crash: Crash returns the
//     file system as a power loss would leave it, each file with its
//     contents as of its last fsync and each directory with its entries
//     as of its last directory fsync (the strict model of LevelDB's test:
//     a file created or renamed but its directory not synced is lost);
//     Kill returns it as the daemon's SIGKILL would, everything written
//     kept. Its files reserve space and take copies into it
//     (journal.ReserveFile), as the journal's memory-mapped segments do,
//     unless MemFS.Plain says they cannot.
//
// Tests of the journal and of the server restart on what these leave and
// check that nothing acknowledged is lost (SQLite's crash and I/O error
// tests are the model for the loops that fail every operation in turn).
package faultfs
