package review

import (
	"os"

	"golang.org/x/sys/unix"
)

// startWriteback starts writing the range to disk and returns at once
// (sync_file_range(2) with SYNC_FILE_RANGE_WRITE alone); errors are those
// of a hint, and the file's close reports a failed write.
func startWriteback(f *os.File, off, n int64) {
	unix.SyncFileRange(int(f.Fd()), off, n, unix.SYNC_FILE_RANGE_WRITE)
}

// dropCached drops the range's clean pages from the page cache
// (posix_fadvise(2) POSIX_FADV_DONTNEED): pages still dirty or being
// written stay.
func dropCached(f *os.File, off, n int64) {
	unix.Fadvise(int(f.Fd()), off, n, unix.FADV_DONTNEED)
}
