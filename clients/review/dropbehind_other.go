//go:build !linux

package review

import "os"

// startWriteback and dropCached do nothing where the page cache is not
// steered (dropbehind_linux.go).
func startWriteback(f *os.File, off, n int64) {}
func dropCached(f *os.File, off, n int64)     {}
