//go:build !linux

package journal

// Datasync makes f's written data durable: f.Sync, where fdatasync(2) is
// not available.
func Datasync(f File) error { return f.Sync() }
