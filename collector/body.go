package collector

import (
	"compress/gzip"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"strings"
	"sync"
	"sync/atomic"
	"time"
)

// Request bodies are read whole, within Limits.MaxBodyBytes and at
// Limits.MinBodyRate, before their batch takes an in-flight slot: a slow
// sender then holds only its own connection and the bytes it sent, never a
// slot that other batches wait for (README "Security and limits").

// errStalled refuses a body that arrived slower than Limits.MinBodyRate.
var errStalled = errors.New("request body arrived too slowly")

// errCut refuses a body that was being read when CutBodies was called.
var errCut = errors.New("request body cut: the server is shutting down")

// errBuffered refuses a body when Limits.MaxBufferedBytes are held.
var errBuffered = errors.New("too many request bodies held in memory")

type unsupportedEncodingError struct{ enc string }

func (e unsupportedEncodingError) Error() string {
	return fmt.Sprintf("content encoding %q is not supported; send gzip or none", e.enc)
}

// bodyReads tracks the bodies being read, to cut them at shutdown, and the
// bytes held by bodies read or being read.
type bodyReads struct {
	mu       sync.Mutex
	cut      bool
	active   map[*pacedReader]struct{}
	buffered atomic.Int64
}

// CutBodies stops reading request bodies: each body being read is cut at
// once and answered 503 with Retry-After and a closed connection, and every
// later request is answered so before its body is read. Batches already
// read go on to commit. Call it first at shutdown, before
// http.Server.Shutdown, so that a stalled sender cannot hold the drain.
func (c *Collector) CutBodies() {
	c.bodies.mu.Lock()
	defer c.bodies.mu.Unlock()
	c.bodies.cut = true
	for p := range c.bodies.active {
		p.stop()
	}
}

// pacedReader reads a request body on the wire, moving the connection's
// read deadline so that the body must keep up MinBodyRate after the grace.
type pacedReader struct {
	r     io.ReadCloser
	rc    *http.ResponseController
	start time.Time
	grace time.Duration
	rate  int64
	n     int64
	// mu orders deadline changes against stop.
	mu      sync.Mutex
	stopped bool
	paced   bool
}

func (p *pacedReader) Read(b []byte) (int, error) {
	p.mu.Lock()
	if p.stopped {
		p.mu.Unlock()
		return 0, errCut
	}
	if p.paced {
		due := p.grace + time.Duration(float64(p.n)/float64(p.rate)*float64(time.Second))
		_ = p.rc.SetReadDeadline(p.start.Add(due))
	}
	p.mu.Unlock()
	n, err := p.r.Read(b)
	p.n += int64(n)
	if err != nil && errors.Is(err, os.ErrDeadlineExceeded) {
		p.mu.Lock()
		defer p.mu.Unlock()
		if p.stopped {
			return n, errCut
		}
		return n, errStalled
	}
	return n, err
}

func (p *pacedReader) Close() error { return p.r.Close() }

// stop cuts the read in progress and any later one.
func (p *pacedReader) stop() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.stopped = true
	_ = p.rc.SetReadDeadline(time.Now())
}

// readBody reads the request body whole, decoding gzip, and returns it with
// the function that gives its bytes back to Limits.MaxBufferedBytes, to be
// called (also on error) once the body is no longer needed.
func (c *Collector) readBody(w http.ResponseWriter, r *http.Request) ([]byte, func(), error) {
	var (
		held int64
		buf  bodyBuf
	)
	release := func() {
		buf.free()
		c.bodies.buffered.Add(-held)
		held = 0
	}
	p, err := c.startRead(w, r)
	if err != nil {
		return nil, release, err
	}
	defer c.endRead(p)

	wire := http.MaxBytesReader(w, p, c.limits.MaxBodyBytes)
	var src io.Reader = wire
	first := int64(32 << 10)
	switch enc := strings.ToLower(strings.TrimSpace(r.Header.Get("Content-Encoding"))); enc {
	case "", "identity":
		if r.ContentLength > 0 {
			first = r.ContentLength + 1 // + 1 to meet EOF without growing
		}
	case "gzip", "x-gzip":
		zr, err := gzip.NewReader(wire)
		if err != nil {
			return nil, release, readErr(fmt.Errorf("read gzip body: %w", err))
		}
		src = newCapReader(zr, c.limits.MaxBodyBytes)
	default:
		return nil, release, unsupportedEncodingError{enc: enc}
	}

	for {
		if b := buf.b; len(b) == cap(b) {
			size := min(max(first, 2*int64(cap(b))), c.limits.MaxBodyBytes+1)
			if c.bodies.buffered.Add(size-int64(cap(b))) > c.limits.MaxBufferedBytes {
				c.bodies.buffered.Add(int64(cap(b)) - size)
				return nil, release, errBuffered
			}
			held += size - int64(cap(b))
			grown := newBodyBuf(int(size), b)
			buf.free()
			buf = grown
		}
		b := buf.b
		n, err := src.Read(b[len(b):cap(b)])
		buf.b = b[:len(b)+n]
		if errors.Is(err, io.EOF) {
			if p.paced {
				_ = p.rc.SetReadDeadline(time.Time{})
			}
			return buf.b, release, nil
		}
		if err != nil {
			return nil, release, readErr(err)
		}
	}
}

// readErr keeps the errors the handler answers by kind and wraps the rest.
func readErr(err error) error {
	var mbe *http.MaxBytesError
	if errors.As(err, &mbe) || errors.Is(err, errStalled) || errors.Is(err, errCut) {
		return err
	}
	return fmt.Errorf("read body: %w", err)
}

// startRead registers a body read, or refuses it after CutBodies.
func (c *Collector) startRead(w http.ResponseWriter, r *http.Request) (*pacedReader, error) {
	p := &pacedReader{
		r: r.Body, rc: http.NewResponseController(w), start: time.Now(),
		grace: c.limits.BodyGrace, rate: c.limits.MinBodyRate,
	}
	// A writer that cannot set deadlines (a test recorder) reads unpaced.
	p.paced = p.rate > 0 && p.rc.SetReadDeadline(p.start.Add(p.grace)) == nil
	c.bodies.mu.Lock()
	defer c.bodies.mu.Unlock()
	if c.bodies.cut {
		return nil, errCut
	}
	if c.bodies.active == nil {
		c.bodies.active = map[*pacedReader]struct{}{}
	}
	c.bodies.active[p] = struct{}{}
	return p, nil
}

func (c *Collector) endRead(p *pacedReader) {
	c.bodies.mu.Lock()
	defer c.bodies.mu.Unlock()
	delete(c.bodies.active, p)
}

// refuseBody answers a body that could not be read.
func (c *Collector) refuseBody(w http.ResponseWriter, k Kind, err error) int {
	var (
		mbe *http.MaxBytesError
		ue  unsupportedEncodingError
	)
	switch {
	case errors.As(err, &mbe):
		return c.refuse(w, http.StatusRequestEntityTooLarge, c.tooLarge())
	case errors.As(err, &ue):
		return c.refuse(w, http.StatusUnsupportedMediaType, err.Error())
	case errors.Is(err, errStalled):
		c.metrics.bodyRefusals.WithLabelValues(k.String(), "stalled").Inc()
		w.Header().Set("Connection", "close")
		return c.refuse(w, http.StatusRequestTimeout, fmt.Sprintf(
			"request body arrived slower than %d bytes/s after the first %s", c.limits.MinBodyRate, c.limits.BodyGrace))
	case errors.Is(err, errCut):
		c.metrics.bodyRefusals.WithLabelValues(k.String(), "shutdown").Inc()
		w.Header().Set("Connection", "close")
		c.retryAfter(w)
		return c.refuse(w, http.StatusServiceUnavailable, "the server is shutting down; retry later")
	case errors.Is(err, errBuffered):
		c.metrics.bodyRefusals.WithLabelValues(k.String(), "buffer_full").Inc()
		c.retryAfter(w)
		return c.refuse(w, http.StatusServiceUnavailable, "too many request bodies in memory; retry later")
	}
	return c.refuse(w, http.StatusBadRequest, err.Error())
}

// capReader fails with *http.MaxBytesError once more than limit bytes
// were read, so a small compressed body cannot expand without bound.
type capReader struct {
	r     io.Reader
	left  int64
	limit int64
}

func newCapReader(r io.Reader, limit int64) *capReader {
	return &capReader{r: r, left: limit, limit: limit}
}

func (cr *capReader) Read(p []byte) (int, error) {
	if cr.left <= 0 {
		// One more byte tells a body of exactly the limit from a longer one.
		var one [1]byte
		if _, err := io.ReadFull(cr.r, one[:]); err != nil {
			return 0, err
		}
		return 0, &http.MaxBytesError{Limit: cr.limit}
	}
	if int64(len(p)) > cr.left {
		p = p[:cr.left]
	}
	n, err := cr.r.Read(p)
	cr.left -= int64(n)
	return n, err
}
