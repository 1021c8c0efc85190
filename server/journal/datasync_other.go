//go:build !linux

package journal

import "errors"

// Datasync makes f's written data durable: f.Sync, where fdatasync(2) is
// not available.
func Datasync(f File) error { return f.Sync() }

// WholeSync is syncfs(2) where it reports errors (Linux 5.8 on); here
// OpenWholeSync always returns nil.
type WholeSync struct{}

// OpenWholeSync returns nil: no syncfs here.
func OpenWholeSync(dir string) (*WholeSync, error) { return nil, nil }

// Sync fails: there is no WholeSync on this system.
func (*WholeSync) Sync() error { return errors.New("journal: no syncfs on this system") }

// Close does nothing.
func (*WholeSync) Close() error { return nil }
