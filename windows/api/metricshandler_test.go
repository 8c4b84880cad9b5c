package api_test

import (
	"bytes"
	"compress/gzip"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	dto "github.com/prometheus/client_model/go"

	"github.com/classwatch/classwatch/windows/api"
)

// prometheusAccept is the Accept header Prometheus sends when scraping
// (from memory of its scrape code; OpenMetrics preferred, text accepted).
const prometheusAccept = "application/openmetrics-text;version=1.0.0,application/openmetrics-text;version=0.0.1;q=0.75,text/plain;version=0.0.4;q=0.5,*/*;q=0.1"

// handlerGatherer is a registry with a few labeled gauges: the handler
// only encodes what a gatherer returns, so their values do not matter.
func handlerGatherer(t *testing.T) prometheus.Gatherer {
	t.Helper()
	reg := prometheus.NewPedanticRegistry()
	g := prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "classwatch_test_ratio", Help: "A test gauge."}, []string{"model", "window"})
	reg.MustRegister(g)
	for i, m := range []string{"parcel-sorter", "desk-router", "line-7"} {
		g.WithLabelValues(m, "1h").Set(float64(i) / 4)
		g.WithLabelValues(m, "1d").Set(float64(i) / 8)
	}
	return reg
}

// TestMetricsHandler checks content and encoding negotiation against
// client_golang v1.25's own promhttp handler serving the same families.
func TestMetricsHandler(t *testing.T) {
	g := handlerGatherer(t)
	opts := promhttp.HandlerOpts{ErrorHandling: promhttp.HTTPErrorOnError, EnableOpenMetrics: true}
	ours, theirs := api.MetricsHandler(g, opts), promhttp.HandlerFor(g, opts)

	for _, tc := range []struct {
		accept, encoding string
		gzip             bool
	}{
		{accept: "", encoding: "", gzip: false},
		{accept: prometheusAccept, encoding: "gzip", gzip: true},
		{accept: "text/plain;version=0.0.4", encoding: "gzip, deflate", gzip: true},
		{accept: prometheusAccept, encoding: "gzip;q=0, identity", gzip: false},
		{accept: prometheusAccept, encoding: "*", gzip: true},
		{accept: prometheusAccept, encoding: "*;q=0.5, gzip;q=0", gzip: false},
		{accept: prometheusAccept, encoding: "GZIP;Q=0.2", gzip: true},
	} {
		serve := func(h http.Handler) (*httptest.ResponseRecorder, []byte) {
			req := httptest.NewRequest(http.MethodGet, "/metrics", nil)
			req.Header.Set("Accept", tc.accept)
			req.Header.Set("Accept-Encoding", tc.encoding)
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, req)
			body := rec.Body.Bytes()
			if rec.Header().Get("Content-Encoding") == "gzip" {
				zr, err := gzip.NewReader(bytes.NewReader(body))
				if err != nil {
					t.Fatal(err)
				}
				if body, err = io.ReadAll(zr); err != nil {
					t.Fatal(err)
				}
			}
			return rec, body
		}
		rec, got := serve(ours)
		ref, want := serve(theirs)
		if rec.Code != http.StatusOK {
			t.Fatalf("Accept-Encoding %q: status %d", tc.encoding, rec.Code)
		}
		if got, want := rec.Header().Get("Content-Encoding") == "gzip", tc.gzip; got != want {
			t.Errorf("Accept-Encoding %q: gzip = %v, want %v", tc.encoding, got, want)
		}
		if got, want := rec.Header().Get("Content-Type"), ref.Header().Get("Content-Type"); got != want {
			t.Errorf("Accept %q: Content-Type %q, want %q", tc.accept, got, want)
		}
		if !bytes.Equal(got, want) {
			t.Errorf("Accept %q, Accept-Encoding %q: body differs from promhttp's:\n%s", tc.accept, tc.encoding, "got:\n"+string(got)+"\nwant:\n"+string(want))
		}
	}

	// An error page goes out uncompressed.
	failing := prometheus.GathererFunc(func() ([]*dto.MetricFamily, error) { return nil, errors.New("store gone") })
	req := httptest.NewRequest(http.MethodGet, "/metrics", nil)
	req.Header.Set("Accept-Encoding", "gzip")
	rec := httptest.NewRecorder()
	api.MetricsHandler(failing, opts).ServeHTTP(rec, req)
	if got, want := rec.Code, http.StatusInternalServerError; got != want {
		t.Errorf("failing gather: status %d, want %d", got, want)
	}
	if got := rec.Header().Get("Content-Encoding"); got != "" {
		t.Errorf("failing gather: Content-Encoding %q, want none", got)
	}
	if !strings.Contains(rec.Body.String(), "store gone") {
		t.Errorf("failing gather: body %q does not name the error", rec.Body.String())
	}
}
