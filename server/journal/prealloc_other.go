//go:build !linux

package journal

import "os"

// osFile is an operating-system file; it is not Preallocated here, so
// the journal appends with write(2).
type osFile struct {
	*os.File
}
