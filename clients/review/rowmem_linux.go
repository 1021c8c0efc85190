package review

import (
	"sync/atomic"
	"syscall"
	"unsafe"
)

// allocRows returns n zero float64s outside the Go heap (allocOutside),
// and the function that gives them back. The smoothed rows of an hour take
// about 70 MB: on the heap, the collector would let the heap grow to twice
// that before collecting, past the review's memory bound; outside it they
// cost their size and no more. Huge pages where the system gives them on
// request: faulting in 100 MB a page of 4 kB at a time cost 0.4 s of CPU,
// as much as writing the rows to a file. Where it does not, a goroutine of
// its own faults the pages in ahead of the smoother, which fills them last
// first, so that the faults take the other core (madvise
// MADV_POPULATE_WRITE, Linux 5.14).
func allocRows(n int) ([]float64, func(), error) {
	v, b, err := allocOutside[float64](n)
	if err != nil || b == nil {
		return v, func() {}, err
	}
	syscall.Madvise(b, syscall.MADV_HUGEPAGE) // a hint: without it, small pages
	var stop atomic.Bool
	done := make(chan struct{})
	go func() {
		defer close(done)
		const madvPopulateWrite = 23
		const step = 4 << 20
		// Chunks from the end; each starts on a page, as madvise wants.
		for lo, hi := (len(b)-1)/step*step, len(b); hi > 0 && !stop.Load(); lo, hi = lo-step, lo {
			if syscall.Madvise(b[lo:hi], madvPopulateWrite) != nil {
				return // an older kernel: the pages fault in as they are written
			}
		}
	}()
	free := func() {
		stop.Store(true)
		<-done
		syscall.Munmap(b)
	}
	return v, free, nil
}

// allocOutside maps n zero values of T (no pointers) and returns them with
// the mapping (nil for n == 0).
func allocOutside[T any](n int) ([]T, []byte, error) {
	size := n * int(unsafe.Sizeof(*new(T)))
	if size == 0 {
		return nil, nil, nil
	}
	b, err := syscall.Mmap(-1, 0, size, syscall.PROT_READ|syscall.PROT_WRITE, syscall.MAP_ANON|syscall.MAP_PRIVATE)
	if err != nil {
		return nil, nil, err
	}
	return unsafe.Slice((*T)(unsafe.Pointer(&b[0])), n), b, nil
}
