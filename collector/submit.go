package collector

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"time"
)

// SubmitOptions describe one body.
type SubmitOptions struct {
	// Format is the body's encoding; FormatAuto detects NDJSON, one JSON
	// object or a JSON array.
	Format Format
	// Source names where the body came from ("http", "file", "nats"); it is
	// only the source label of classwatch_source_lines_total.
	Source string
}

// ErrBusy refuses a body when Limits.MaxInFlight bodies were already
// running and no slot freed within Limits.QueueWait: backpressure, retry
// later. Nothing of the body was read.
var ErrBusy = errors.New("too many batches in flight")

// TooLargeError reports a body over Limits.MaxBodyBytes; nothing of it
// was kept.
type TooLargeError struct {
	Limit int64
}

// Error names the limit.
func (e *TooLargeError) Error() string {
	return fmt.Sprintf("body is larger than the %d-byte limit", e.Limit)
}

// Submit runs one body (one HTTP request body, one stream message) through
// decode → validate → one store transaction → the commit hook (the rolling
// windows). Line numbers in the result and errors are relative to the body.
// It waits up to Limits.QueueWait for an ingest slot and returns ErrBusy
// without one. A body that cannot be taken as a whole gives *TooLargeError
// (over Limits.MaxBodyBytes), *LineTooLongError (a line over
// Limits.MaxLineBytes) or *BodyError (a JSON body that does not parse); a
// store that could not commit gives *StoreError wrapping
// store.ErrUnavailable. In all these cases nothing of the body was kept.
// Otherwise the Result says what became of each line; bad lines never sink
// the good ones. No token applies: Submit may write every model.
func (c *Collector) Submit(ctx context.Context, k Kind, body io.Reader, opts SubmitOptions) (Result, error) {
	return c.submit(ctx, k, body, opts, nil)
}

// submit is Submit with the writing token, nil for every model.
func (c *Collector) submit(ctx context.Context, k Kind, body io.Reader, opts SubmitOptions, tok *tokenHash) (Result, error) {
	empty := Result{Rejected: []LineError{}}
	if err := k.check(); err != nil {
		return empty, err
	}
	if err := c.acquire(ctx); err != nil {
		if errors.Is(err, ErrBusy) {
			c.metrics.queueTimeouts.WithLabelValues(k.String()).Inc()
		}
		return empty, err
	}
	defer c.release()
	src := newLineSource(newCapReader(body, c.limits.MaxBodyBytes), opts.Format, c.limits.MaxLineBytes)
	res, err := c.ingest(ctx, src, ingestRun{
		kind: k, source: cmp.Or(opts.Source, "unknown"), token: tok, longLineFatal: true,
		listLimit: MaxListedRejections, keep: MaxListedRejections,
	})
	var mbe *http.MaxBytesError
	if errors.As(err, &mbe) {
		return res, &TooLargeError{Limit: mbe.Limit}
	}
	return res, err
}

// acquire takes an in-flight slot, waiting up to QueueWait; it returns
// ErrBusy when none freed in time, or ctx's error.
func (c *Collector) acquire(ctx context.Context) error {
	select {
	case c.slots <- struct{}{}:
	default:
		t := time.NewTimer(c.limits.QueueWait)
		defer t.Stop()
		select {
		case c.slots <- struct{}{}:
		case <-t.C:
			return ErrBusy
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	c.metrics.inFlight.Inc()
	return nil
}

func (c *Collector) release() {
	c.metrics.inFlight.Dec()
	<-c.slots
}
