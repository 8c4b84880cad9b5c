package api

import (
	"compress/gzip"
	"net/http"
	"strconv"
	"strings"
	"sync"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// MetricsHandler serves g like promhttp.HandlerFor with opts (content
// negotiation, OpenMetrics, name[] filters, error handling), except that it
// compresses with gzip itself, at gzip.BestSpeed: promhttp compresses at
// the default level, which on a scrape of 5 MB of text costs more than
// gathering and encoding it. opts.DisableCompression turns compression off
// altogether; opts.OfferedCompressions is ignored (gzip is the only one
// offered).
func MetricsHandler(g prometheus.Gatherer, opts promhttp.HandlerOpts) http.Handler {
	compress := !opts.DisableCompression
	opts.DisableCompression = true
	opts.OfferedCompressions = nil
	h := promhttp.HandlerFor(g, opts)
	writers := &sync.Pool{New: func() any {
		w, _ := gzip.NewWriterLevel(nil, gzip.BestSpeed) // the level is valid: no error
		return w
	}}
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if !compress || !acceptsGzip(r.Header.Values("Accept-Encoding")) {
			h.ServeHTTP(w, r)
			return
		}
		gw := &gzipResponse{ResponseWriter: w, writers: writers}
		defer gw.close()
		h.ServeHTTP(gw, r)
	})
}

// acceptsGzip reports whether Accept-Encoding values accept gzip: named
// with a non-zero q, or through "*" when gzip is not named (RFC 9110
// §12.5.3).
func acceptsGzip(values []string) bool {
	star := false
	for _, v := range values {
		for item := range strings.SplitSeq(v, ",") {
			coding, params, _ := strings.Cut(item, ";")
			coding = strings.ToLower(strings.TrimSpace(coding))
			if coding != "gzip" && coding != "*" {
				continue
			}
			ok := qNonZero(params)
			if coding == "gzip" {
				return ok
			}
			star = star || ok
		}
	}
	return star
}

// qNonZero reports whether an Accept-Encoding item's parameters leave its
// weight above zero (no q parameter means q=1).
func qNonZero(params string) bool {
	for p := range strings.SplitSeq(params, ";") {
		name, value, _ := strings.Cut(p, "=")
		if strings.EqualFold(strings.TrimSpace(name), "q") {
			q, err := strconv.ParseFloat(strings.TrimSpace(value), 64)
			return err == nil && q > 0
		}
	}
	return true
}

// gzipResponse compresses a 200 response's body. Any other status (an
// error page) goes out as it is, uncompressed.
type gzipResponse struct {
	http.ResponseWriter
	writers *sync.Pool
	gz      *gzip.Writer
	started bool
}

// WriteHeader sends the header, announcing gzip when the status is 200.
func (w *gzipResponse) WriteHeader(code int) {
	if w.started {
		return
	}
	w.started = true
	if code == http.StatusOK {
		h := w.Header()
		h.Set("Content-Encoding", "gzip")
		h.Add("Vary", "Accept-Encoding")
		h.Del("Content-Length")
		w.gz = w.writers.Get().(*gzip.Writer)
		w.gz.Reset(w.ResponseWriter)
	}
	w.ResponseWriter.WriteHeader(code)
}

// Write writes p to the body, compressed when the status is 200.
func (w *gzipResponse) Write(p []byte) (int, error) {
	if !w.started {
		w.WriteHeader(http.StatusOK)
	}
	if w.gz != nil {
		return w.gz.Write(p)
	}
	return w.ResponseWriter.Write(p)
}

// close ends the gzip stream, if one was started, and frees its writer.
func (w *gzipResponse) close() {
	if w.gz == nil {
		return
	}
	// The client may have gone; its error has already surfaced from Write.
	_ = w.gz.Close()
	w.writers.Put(w.gz)
	w.gz = nil
}
