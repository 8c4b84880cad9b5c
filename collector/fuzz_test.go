package collector_test

import (
	"bytes"
	"compress/gzip"
	"encoding/json"
	"io"
	"net/http"
	"testing"

	"github.com/classwatch/classwatch/collector"
)

// Limits of FuzzHTTPBody, small so that the fuzzer reaches them.
const (
	fuzzBodyLimit = 4096
	fuzzLineLimit = 512
)

// nonBlankLines counts the lines ingest reads from an NDJSON body, and
// reports whether one is over the line limit.
func nonBlankLines(body []byte) (n int, tooLong bool) {
	for i, line := range bytes.SplitAfter(body, []byte("\n")) {
		if i == 0 {
			line = bytes.TrimPrefix(line, []byte("\xef\xbb\xbf"))
		}
		line = bytes.TrimRight(line, "\r\n")
		if len(line) > fuzzLineLimit {
			tooLong = true
		}
		if len(bytes.TrimSpace(line)) > 0 {
			n++
		}
	}
	return n, tooLong
}

// FuzzHTTPBody sends a body to POST /v1/predictions, gzip-encoded or not,
// with a length or chunked, and checks the handler's body reading: the
// size limits hold on the decoded bytes, nothing answers 5xx, and every
// non-blank line is accounted for exactly once (accepted + duplicates +
// listed + omitted rejections).
func FuzzHTTPBody(f *testing.F) {
	b := setup(f, sqliteBackend(), func(o *collector.Options) {
		o.Limits.MaxBodyBytes = fuzzBodyLimit
		o.Limits.MaxLineBytes = fuzzLineLimit
	})
	for _, seed := range []string{
		`{"model":"card-fraud","id":"f-1","predicted":"legit"}` + "\n",
		"\xef\xbb\xbf{\"model\":\"card-fraud\",\"id\":\"f-2\",\"predicted\":\"fraud\"}\r\n\r\n x\n",
		`{"model":"card-fraud","id":"f-3","predicted":"legit","scores":{"legit":0.5,"legit":0.4}}`,
		string(bytes.Repeat([]byte("x\n"), 3000)),
		string(bytes.Repeat([]byte("y"), 600)),
	} {
		f.Add([]byte(seed), false, false)
		f.Add([]byte(seed), true, true)
	}
	f.Fuzz(func(t *testing.T, body []byte, gz, chunked bool) {
		wire := body
		if gz {
			var buf bytes.Buffer
			zw := gzip.NewWriter(&buf)
			_, _ = zw.Write(body)
			_ = zw.Close()
			wire = buf.Bytes()
		}
		req, err := http.NewRequest(http.MethodPost, b.srv.URL+"/v1/predictions", bytes.NewReader(wire))
		if err != nil {
			t.Fatal(err)
		}
		req.Header.Set("Content-Type", "application/x-ndjson")
		if gz {
			req.Header.Set("Content-Encoding", "gzip")
		}
		if chunked {
			req.ContentLength = -1
			req.Body = io.NopCloser(bytes.NewReader(wire))
		}
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		var r reply
		if err := json.NewDecoder(resp.Body).Decode(&r); err != nil {
			t.Fatalf("status %d: decode response: %v", resp.StatusCode, err)
		}
		lines, tooLong := nonBlankLines(body)
		switch {
		case len(body) > fuzzBodyLimit:
			if resp.StatusCode != http.StatusRequestEntityTooLarge {
				t.Fatalf("a %d-byte body: status %d, want 413", len(body), resp.StatusCode)
			}
		case tooLong:
			if resp.StatusCode != http.StatusRequestEntityTooLarge {
				t.Fatalf("a line over the limit: status %d, want 413", resp.StatusCode)
			}
		default:
			if resp.StatusCode != http.StatusOK && resp.StatusCode != http.StatusBadRequest {
				t.Fatalf("status %d (%+v), want 200 or 400", resp.StatusCode, r)
			}
			if got := r.Accepted + r.Duplicates + len(r.Rejected) + r.RejectedOmitted; got != lines {
				t.Fatalf("%+v accounts for %d lines, the body has %d", r, got, lines)
			}
		}
	})
}
