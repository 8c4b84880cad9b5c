package sim

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"strings"
	"time"
)

// Stats summarise a running simulation.
type Stats struct {
	// SimTime is how far the simulated clock has run.
	SimTime time.Time
	// Predictions and Labels count the lines sent, malformed ones and
	// resends included.
	Predictions int
	Labels      int
	// Accepted, Duplicates and Rejected add up the daemon's replies.
	Accepted   int
	Duplicates int
	Rejected   int
	// Retries counts requests sent again after 429, 503, another 5xx or a
	// failed connection.
	Retries int
}

// Limits of Run's retries.
const (
	// maxFailures is how many failed connections or 5xx replies other
	// than 503 in a row Run tolerates for one request.
	maxFailures = 5
	// maxRetryAfter caps the wait a Retry-After header may ask for.
	maxRetryAfter = 30 * time.Second
	// replyLimit caps the reply bytes read.
	replyLimit = 1 << 20
)

// Run plays the scenario against the daemon at baseURL (such as
// "http://127.0.0.1:9640"), posting NDJSON batches to /v1/predictions and
// /v1/labels every opts.Interval of real time while the simulated clock runs
// opts.Speed times faster than the wall clock.
//
// The simulated clock never passes the wall clock, because the daemon
// rejects event times ahead of its own: with Start in the past, Run replays
// the past fast, then goes on in real time. Start it Duration before now
// (or leave Duration 0) for a demo that ends in the present.
//
// The clock advances by the real time that passed, but by at most five
// intervals per round, so a slow daemon slows the simulation instead of
// receiving ever larger batches; in steady state Run sends about
// opts.Speed × 90/3600 predictions per real second plus their labels. A
// 429 or 503 reply is retried after its Retry-After (1s when absent);
// failed connections and other 5xx replies are retried a few times with
// backoff; a 400 reply counts its lines as rejected and Run goes on.
//
// progress, when not nil, is called from Run's goroutine after every round.
// client nil means a client with a 30s timeout. Run returns nil when ctx is
// done or opts.Duration of simulated time has been covered, and an error
// when the options are invalid or the daemon cannot take the traffic.
func Run(ctx context.Context, opts Options, baseURL string, client *http.Client, progress func(Stats)) error {
	if opts.Speed < 0 || opts.Interval < 0 || opts.MaxLines < 0 || opts.Duration < 0 {
		return errors.New("simulation options must not be negative")
	}
	g, err := NewGenerator(opts)
	if err != nil {
		return err
	}
	if client == nil {
		client = &http.Client{Timeout: 30 * time.Second}
	}
	speed := cmp.Or(opts.Speed, DefaultSpeed)
	interval := cmp.Or(opts.Interval, 200*time.Millisecond)
	var end time.Time
	if opts.Duration > 0 {
		end = opts.Start.Add(opts.Duration)
	}
	p := &poster{
		client:   client,
		base:     strings.TrimSuffix(baseURL, "/"),
		maxLines: cmp.Or(opts.MaxLines, 500),
	}
	p.stats.SimTime = opts.Start

	ticker := time.NewTicker(interval)
	defer ticker.Stop()
	last := time.Now()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-ticker.C:
		}
		now := time.Now()
		step := min(now.Sub(last), 5*interval)
		last = now
		sim := p.stats.SimTime.Add(time.Duration(float64(step) * speed))
		if sim.After(now) {
			// Caught up: from here on the simulation runs in real time
			// (or waits, when Start lies ahead).
			sim = now.UTC()
			if sim.Before(p.stats.SimTime) {
				sim = p.stats.SimTime
			}
		}
		finished := !end.IsZero() && !sim.Before(end)
		if finished {
			sim = end
		}
		preds, labels := g.Next(sim)
		// Predictions first, so labels of this round find them.
		if err := p.send(ctx, "/v1/predictions", preds, &p.stats.Predictions); err != nil {
			return ignoreDone(ctx, err)
		}
		if err := p.send(ctx, "/v1/labels", labels, &p.stats.Labels); err != nil {
			return ignoreDone(ctx, err)
		}
		p.stats.SimTime = sim
		if progress != nil {
			progress(p.stats)
		}
		if finished {
			return nil
		}
	}
}

// ignoreDone turns an error caused by ctx ending into nil.
func ignoreDone(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		return nil
	}
	return err
}

// poster sends batches and keeps the Stats.
type poster struct {
	client   *http.Client
	base     string
	maxLines int
	stats    Stats
}

// reply is the daemon's answer to an ingest request (README.md "HTTP API").
type reply struct {
	Accepted   int `json:"accepted"`
	Duplicates int `json:"duplicates"`
	Rejected   []struct {
		Line  int    `json:"line"`
		Error string `json:"error"`
	} `json:"rejected"`
}

// send posts lines to path in bodies of at most maxLines lines and adds
// them to *sent.
func (p *poster) send(ctx context.Context, path string, lines []Line, sent *int) error {
	for len(lines) > 0 {
		n := min(len(lines), p.maxLines)
		var body bytes.Buffer
		for _, l := range lines[:n] {
			body.Write(l.Data)
			body.WriteByte('\n')
		}
		if err := p.post(ctx, path, body.Bytes(), n); err != nil {
			return err
		}
		*sent += n
		lines = lines[n:]
	}
	return nil
}

// post sends one body of n lines, retrying as Run describes.
func (p *poster) post(ctx context.Context, path string, body []byte, n int) error {
	failures := 0
	for {
		wait, err := p.try(ctx, path, body, n)
		if err == nil && wait == 0 {
			return nil
		}
		if err != nil {
			var fe *failedError
			if !errors.As(err, &fe) {
				return err
			}
			failures++
			if failures > maxFailures || ctx.Err() != nil {
				return fmt.Errorf("post %s: %w", path, fe.err)
			}
			wait = time.Duration(1<<failures) * 250 * time.Millisecond
		}
		p.stats.Retries++
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return ctx.Err()
		case <-t.C:
		}
	}
}

// failedError marks a failure that a retry may cure.
type failedError struct{ err error }

func (e *failedError) Error() string { return e.err.Error() }
func (e *failedError) Unwrap() error { return e.err }

// try makes one request. It returns a positive wait when the daemon asked
// to come back later, a *failedError for a failure worth retrying, and
// another error for one that is not.
func (p *poster) try(ctx context.Context, path string, body []byte, n int) (time.Duration, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, p.base+path, bytes.NewReader(body))
	if err != nil {
		return 0, fmt.Errorf("build request: %w", err)
	}
	req.Header.Set("Content-Type", "application/x-ndjson")
	resp, err := p.client.Do(req)
	if err != nil {
		return 0, &failedError{err}
	}
	data, err := io.ReadAll(io.LimitReader(resp.Body, replyLimit))
	resp.Body.Close()
	if err != nil {
		return 0, &failedError{fmt.Errorf("read reply: %w", err)}
	}
	switch code := resp.StatusCode; {
	case code >= 200 && code < 300:
		var r reply
		if err := json.Unmarshal(data, &r); err != nil {
			return 0, fmt.Errorf("post %s: decode reply: %w", path, err)
		}
		p.stats.Accepted += r.Accepted
		p.stats.Duplicates += r.Duplicates
		p.stats.Rejected += len(r.Rejected)
		return 0, nil
	case code == http.StatusBadRequest:
		// Every line was rejected (or the body was unreadable): the
		// rare batch made only of malformed lines. Count it and go on.
		p.stats.Rejected += n
		return 0, nil
	case code == http.StatusTooManyRequests || code == http.StatusServiceUnavailable:
		return retryAfter(resp.Header.Get("Retry-After"), time.Now()), nil
	case code >= 500:
		return 0, &failedError{fmt.Errorf("%s: %s", resp.Status, snippet(data))}
	default:
		return 0, fmt.Errorf("post %s: %s: %s", path, resp.Status, snippet(data))
	}
}

// retryAfter reads a Retry-After value, delay-seconds or an HTTP date
// (RFC 9110 §10.2.3), as a wait between 1ms and maxRetryAfter; a missing or
// unreadable value means one second.
func retryAfter(v string, now time.Time) time.Duration {
	d := time.Second
	if s, err := strconv.Atoi(strings.TrimSpace(v)); err == nil && s >= 0 {
		d = time.Duration(s) * time.Second
	} else if t, err := http.ParseTime(v); err == nil {
		d = t.Sub(now)
	}
	return max(min(d, maxRetryAfter), time.Millisecond)
}

// snippet returns the start of a reply body for an error message.
func snippet(data []byte) string {
	s := strings.TrimSpace(string(data))
	if len(s) > 200 {
		s = s[:200] + "…"
	}
	return s
}
