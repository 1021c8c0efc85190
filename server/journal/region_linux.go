package journal

import (
	"errors"
	"fmt"
	"os"
	"runtime/debug"
	"sync/atomic"
	"syscall"

	"golang.org/x/sys/unix"
)

// mapRegion appends to an operating-system file through a shared memory
// map of a window of it. A copy costs no system call, where write(2) cost
// 4.8 us a sample of the service's CPU (DEVELOPERS.md, "RobotRates,
// session by session": session 14); the kernel takes a page fault when a
// copy first dirties a page after it was written back (one in 20 or so
// samples). The space is reserved with
// fallocate(2) before anything is copied into it, so that a copy never
// needs a block the disk has not got (which would be a SIGBUS); a fault
// that happens anyway (an I/O error reading a page in, the file cut short
// by another program) is caught and returned as an error wrapping EIO
// (guarded).
type mapRegion struct {
	f    *os.File
	mem  []byte // the window
	base int64  // the file offset of mem[0]
}

// mapWindow is the length of the window mapped at a time: what a robot's
// journal holds of the page cache in the daemon's address space.
const mapWindow = 4 << 20

func mapRegionOf(f *os.File) region { return &mapRegion{f: f} }

// reserve allocates the file's first size bytes with fallocate(2),
// extending it (already allocated blocks stay as they are).
func (r *mapRegion) reserve(size int64) error {
	for {
		err := unix.Fallocate(int(r.f.Fd()), 0, 0, size)
		switch {
		case err == unix.EINTR:
			continue
		case err == unix.EOPNOTSUPP || err == unix.ENOSYS:
			return fmt.Errorf("fallocate %s: %w", r.f.Name(), errors.ErrUnsupported)
		case err != nil:
			return &os.PathError{Op: "fallocate", Path: r.f.Name(), Err: err}
		}
		return nil
	}
}

// copyFrames copies the frames b to byte off of the file (copyOrdered),
// mapping the window that holds them first if the current one does not.
// After a fault how much was copied is not known: n is then 0.
func (r *mapRegion) copyFrames(b []byte, off int64) (int, error) {
	end := off + int64(len(b))
	if r.mem == nil || off < r.base || end > r.base+int64(len(r.mem)) {
		if err := r.remap(off, end); err != nil {
			return 0, err
		}
	}
	dst := r.mem[off-r.base : end-r.base]
	if err := guarded(func() {
		copyOrdered(b, func(at int, src []byte) error {
			copy(dst[at:], src)
			return nil
		})
	}); err != nil {
		return 0, err
	}
	return len(b), nil
}

// remap maps the window from the page that holds off, at least to end.
func (r *mapRegion) remap(off, end int64) error {
	r.release()
	page := int64(os.Getpagesize())
	base := off &^ (page - 1)
	length := max(mapWindow, (end-base+page-1)&^(page-1))
	mem, err := unix.Mmap(int(r.f.Fd()), base, int(length), unix.PROT_READ|unix.PROT_WRITE, unix.MAP_SHARED)
	if err != nil {
		return &os.PathError{Op: "mmap", Path: r.f.Name(), Err: err}
	}
	r.mem, r.base = mem, base
	return nil
}

// prefault makes the pages of [off, end) that the window holds present
// and writable with one madvise(MADV_POPULATE_WRITE) (Linux 5.14 and
// later): the kernel does for them what the copies' page faults would, in
// one system call, and a page it cannot ready is an error (EFAULT where a
// copy would have met SIGBUS), not a signal. Pages outside the window are
// left to the copies: remapping here would cost what it saves. A kernel
// that does not know the advice (EINVAL; the range is page-aligned) is
// told so once, and not asked again by any writer (populateRefused).
func (r *mapRegion) prefault(off, end int64) error {
	if r.mem == nil || populateRefused.Load() {
		return nil
	}
	page := int64(os.Getpagesize())
	off = max(off&^(page-1), r.base)
	end = min(end, r.base+int64(len(r.mem)))
	if end <= off {
		return nil
	}
	if err := unix.Madvise(r.mem[off-r.base:end-r.base], unix.MADV_POPULATE_WRITE); err != nil {
		if err == unix.EINVAL {
			populateRefused.Store(true)
		}
		return &os.PathError{Op: "madvise", Path: r.f.Name(), Err: err}
	}
	return nil
}

// populateRefused is set once the kernel refused MADV_POPULATE_WRITE.
var populateRefused atomic.Bool

func (r *mapRegion) release() error {
	if r.mem == nil {
		return nil
	}
	err := unix.Munmap(r.mem)
	r.mem = nil
	return err
}

// guarded runs copy, which stores into a mapped file, and returns a fault
// it meets (SIGBUS or SIGSEGV: the page could not be read in, or is past
// the end of the file) as an error wrapping EIO rather than crashing the
// daemon (runtime/debug.SetPanicOnFault, which is meant for memory-mapped
// files).
func guarded(copy func()) (err error) {
	old := debug.SetPanicOnFault(true)
	defer func() {
		debug.SetPanicOnFault(old)
		if e := recover(); e != nil {
			fault, ok := e.(interface{ Addr() uintptr })
			if !ok {
				panic(e)
			}
			err = fmt.Errorf("copying into the mapped journal: a memory fault at %#x (the page could not be read in, or the file was cut short under the map): %w", fault.Addr(), syscall.EIO)
		}
	}()
	copy()
	return nil
}
