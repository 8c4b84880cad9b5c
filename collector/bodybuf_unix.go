//go:build unix

package collector

import "syscall"

// mapThreshold is the size from which a body buffer is mapped outside the
// Go heap.
const mapThreshold = 256 << 10

// bodyBuf is the memory a request body is read into. A large one is an
// anonymous mapping outside the Go heap: held while its batch waits and
// runs, it would otherwise double the heap the collector lets grow before
// it collects (GOGC), and an 8 MiB body would cost some 16 MiB more.
type bodyBuf struct {
	b      []byte
	mapped bool
}

// newBodyBuf returns a buffer of length 0 and capacity size holding
// prefix; free must be called once no slice of it is used.
func newBodyBuf(size int, prefix []byte) bodyBuf {
	if size >= mapThreshold {
		m, err := syscall.Mmap(-1, 0, size, syscall.PROT_READ|syscall.PROT_WRITE, syscall.MAP_ANON|syscall.MAP_PRIVATE)
		if err == nil {
			return bodyBuf{b: append(m[:0], prefix...), mapped: true}
		}
	}
	return bodyBuf{b: append(make([]byte, 0, size), prefix...)}
}

// free gives a mapped buffer back to the system.
func (bb *bodyBuf) free() {
	if bb.mapped {
		_ = syscall.Munmap(bb.b[:cap(bb.b)])
	}
	*bb = bodyBuf{}
}
