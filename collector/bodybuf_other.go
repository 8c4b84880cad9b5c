//go:build !unix

package collector

// bodyBuf is the memory a request body is read into.
type bodyBuf struct{ b []byte }

// newBodyBuf returns a buffer of length 0 and capacity size holding
// prefix.
func newBodyBuf(size int, prefix []byte) bodyBuf {
	return bodyBuf{b: append(make([]byte, 0, size), prefix...)}
}

// free drops the buffer.
func (bb *bodyBuf) free() { *bb = bodyBuf{} }
