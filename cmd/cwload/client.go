package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"time"
)

// Bounds on one request.
const (
	requestTimeout = 10 * time.Minute
	// maxRetries bounds the retries of a batch answered 503.
	maxRetries = 20
	// maxRetryWait caps the wait a Retry-After header asks for.
	maxRetryWait = 10 * time.Second
)

// client talks to one daemon over loopback HTTP.
type client struct {
	http *http.Client
	base string
}

// newClient returns a client keeping up to conns connections open.
func newClient(base string, conns int) *client {
	tr := &http.Transport{
		MaxIdleConnsPerHost: conns,
		// The scrape benchmark reads compressed bodies as they come.
		DisableCompression: true,
		IdleConnTimeout:    time.Minute,
	}
	return &client{http: &http.Client{Transport: tr, Timeout: requestTimeout}, base: base}
}

func (c *client) close() { c.http.CloseIdleConnections() }

// ingestAnswer is the body of an ingest response (collector/doc.go).
type ingestAnswer struct {
	Accepted   int `json:"accepted"`
	Duplicates int `json:"duplicates"`
	Rejected   []struct {
		Line  int    `json:"line"`
		Error string `json:"error"`
	} `json:"rejected"`
	Error string `json:"error"`
}

// push posts one NDJSON batch of `lines` new lines to path and checks that
// every line was accepted. A 503 is retried after its Retry-After; the
// latency returned is that of the successful request.
func (c *client) push(ctx context.Context, path string, body []byte, lines int) (time.Duration, int, error) {
	for retries := 0; ; retries++ {
		req, err := http.NewRequestWithContext(ctx, http.MethodPost, c.base+path, bytes.NewReader(body))
		if err != nil {
			return 0, retries, fmt.Errorf("build request: %w", err)
		}
		req.Header.Set("Content-Type", "application/x-ndjson")
		start := time.Now()
		resp, err := c.http.Do(req)
		if err != nil {
			return 0, retries, fmt.Errorf("post %s: %w", path, err)
		}
		data, err := io.ReadAll(resp.Body)
		resp.Body.Close()
		latency := time.Since(start)
		if err != nil {
			return 0, retries, fmt.Errorf("read answer of %s: %w", path, err)
		}
		if resp.StatusCode == http.StatusServiceUnavailable && retries < maxRetries {
			wait := time.Second
			if s, err := strconv.Atoi(resp.Header.Get("Retry-After")); err == nil && s > 0 {
				wait = min(time.Duration(s)*time.Second, maxRetryWait)
			}
			select {
			case <-ctx.Done():
				return 0, retries, ctx.Err()
			case <-time.After(wait):
			}
			continue
		}
		if resp.StatusCode != http.StatusOK {
			return 0, retries, fmt.Errorf("post %s: %s: %s", path, resp.Status, excerpt(data))
		}
		var a ingestAnswer
		if err := json.Unmarshal(data, &a); err != nil {
			return 0, retries, fmt.Errorf("decode answer of %s: %w", path, err)
		}
		if len(a.Rejected) > 0 {
			r := a.Rejected[0]
			return 0, retries, fmt.Errorf("post %s: %d lines rejected, the first (line %d): %s", path, len(a.Rejected), r.Line, r.Error)
		}
		if a.Accepted != lines {
			return 0, retries, fmt.Errorf("post %s: %d of %d lines accepted, %d duplicates", path, a.Accepted, lines, a.Duplicates)
		}
		return latency, retries, nil
	}
}

// getJSON reads path and decodes its JSON body into v.
func (c *client) getJSON(ctx context.Context, path string, v any) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, c.base+path, nil)
	if err != nil {
		return fmt.Errorf("build request: %w", err)
	}
	resp, err := c.http.Do(req)
	if err != nil {
		return fmt.Errorf("get %s: %w", path, err)
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	if err != nil {
		return fmt.Errorf("read %s: %w", path, err)
	}
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("get %s: %s: %s", path, resp.Status, excerpt(data))
	}
	if err := json.Unmarshal(data, v); err != nil {
		return fmt.Errorf("decode %s: %w", path, err)
	}
	return nil
}

// excerpt shortens a response body for an error message.
func excerpt(data []byte) string {
	const limit = 300
	s := string(bytes.TrimSpace(data))
	if len(s) > limit {
		s = s[:limit] + "…"
	}
	return s
}
