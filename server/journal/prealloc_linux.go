package journal

import (
	"errors"
	"fmt"
	"os"
	"runtime/debug"
	"syscall"
)

// osFile is an operating-system file that is Preallocated: Allocate
// extends it with fallocate(2) and maps the part being appended to,
// shared, so that StoreAt is a copy into the page cache.
type osFile struct {
	*os.File
	m    []byte // the file's bytes from base, mapped shared; nil: none
	base int64
}

// Allocate extends the file to size bytes with fallocate(2) (mode 0: the
// size changes, the new bytes read as zeros) and maps it from the page
// that holds from to size: only the part being appended to, so that the
// pages mapped stay few however long the segment grows. The file must be
// open for reading and writing.
func (f *osFile) Allocate(from, size int64) error {
	fi, err := f.File.Stat()
	if err != nil {
		return err
	}
	cur := fi.Size()
	if size > cur {
		for {
			if err = syscall.Fallocate(int(f.Fd()), 0, cur, size-cur); err != syscall.EINTR {
				break
			}
		}
		if errors.Is(err, syscall.EOPNOTSUPP) {
			return fmt.Errorf("fallocate %s: %w", f.Name(), errors.ErrUnsupported)
		}
		if err != nil {
			return &os.PathError{Op: "fallocate", Path: f.Name(), Err: err}
		}
	}
	if err := f.unmap(); err != nil {
		return err
	}
	base := from &^ int64(os.Getpagesize()-1)
	m, err := syscall.Mmap(int(f.Fd()), base, int(max(size, cur)-base), syscall.PROT_READ|syscall.PROT_WRITE, syscall.MAP_SHARED)
	if errors.Is(err, syscall.ENODEV) && size > cur {
		// Not mappable: back to the old size, so that writes append
		// where the data ends.
		if terr := f.File.Truncate(cur); terr != nil {
			return &os.PathError{Op: "truncate", Path: f.Name(), Err: terr}
		}
	}
	if errors.Is(err, syscall.ENODEV) {
		return fmt.Errorf("mmap %s: %w", f.Name(), errors.ErrUnsupported)
	}
	if err != nil {
		return &os.PathError{Op: "mmap", Path: f.Name(), Err: err}
	}
	f.m, f.base = m, base
	return nil
}

// StoreAt copies p into the mapping. A fault there (a page that could not
// be read back from the disk, or a file that something else truncated)
// is reported as an error instead of ending the process
// (debug.SetPanicOnFault).
func (f *osFile) StoreAt(p []byte, off int64) (n int, err error) {
	if off < f.base || off+int64(len(p)) > f.base+int64(len(f.m)) {
		return 0, &os.PathError{Op: "store", Path: f.Name(), Err: fmt.Errorf("bytes %d to %d outside the %d to %d mapped", off, off+int64(len(p)), f.base, f.base+int64(len(f.m)))}
	}
	defer debug.SetPanicOnFault(debug.SetPanicOnFault(true))
	defer func() {
		if r := recover(); r != nil {
			n, err = 0, &os.PathError{Op: "store", Path: f.Name(), Err: fmt.Errorf("%w: %v", syscall.EIO, r)}
		}
	}()
	return copy(f.m[off-f.base:], p), nil
}

// Truncate unmaps the file before it changes its size, so that no mapped
// page lies past its end.
func (f *osFile) Truncate(size int64) error {
	if err := f.unmap(); err != nil {
		return err
	}
	return f.File.Truncate(size)
}

// Close unmaps and closes the file.
func (f *osFile) Close() error {
	err := f.unmap()
	if cerr := f.File.Close(); err == nil {
		err = cerr
	}
	return err
}

func (f *osFile) unmap() error {
	if f.m == nil {
		return nil
	}
	err := syscall.Munmap(f.m)
	f.m = nil
	if err != nil {
		return &os.PathError{Op: "munmap", Path: f.Name(), Err: err}
	}
	return nil
}
