//go:build !linux

package review

// allocRows returns n zero float64s, on the heap where the anonymous
// mapping of rowmem_linux.go is not used, and the function that gives them back.
func allocRows(n int) ([]float64, func(), error) {
	return make([]float64, n), func() {}, nil
}
