package collector

import (
	"bytes"
	"context"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"runtime"
	rtmetrics "runtime/metrics"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// heapPeak samples the heap in use (live and not yet collected objects
// plus unused heap spans) every millisecond until stop, and returns its
// greatest value.
func heapPeak(stop <-chan struct{}) uint64 {
	samples := []rtmetrics.Sample{
		{Name: "/memory/classes/heap/objects:bytes"},
		{Name: "/memory/classes/heap/unused:bytes"},
	}
	var peak uint64
	t := time.NewTicker(time.Millisecond)
	defer t.Stop()
	for {
		rtmetrics.Read(samples)
		peak = max(peak, samples[0].Value.Uint64()+samples[1].Value.Uint64())
		select {
		case <-stop:
			return peak
		case <-t.C:
		}
	}
}

// BenchmarkAllBadBody posts a body of Limits.MaxBodyBytes (8 MiB) of "x"
// lines, every one rejected, through a real HTTP server and reports the peak
// heap in use above the heap before the request, in MiB and as a ratio to
// the body limit (README "Security and limits": at most 2).
func BenchmarkAllBadBody(b *testing.B) {
	ctx := context.Background()
	st, err := sqlitestore.Open(ctx, filepath.Join(b.TempDir(), "mem.db"), sqlitestore.Options{})
	if err != nil {
		b.Fatal(err)
	}
	defer st.Close()
	if err := st.Migrate(ctx); err != nil {
		b.Fatal(err)
	}
	c, err := New(Options{Store: st, Registerer: prometheus.NewRegistry(),
		Models: []ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}}}})
	if err != nil {
		b.Fatal(err)
	}
	mux := http.NewServeMux()
	c.Register(mux)
	srv := httptest.NewServer(mux)
	defer srv.Close()
	body := bytes.Repeat([]byte("x\n"), DefaultMaxBodyBytes/2)
	var worst float64
	for b.Loop() {
		runtime.GC()
		var idle runtime.MemStats
		runtime.ReadMemStats(&idle)
		stop := make(chan struct{})
		var peak uint64
		var wg sync.WaitGroup
		wg.Go(func() { peak = heapPeak(stop) })
		resp, err := http.Post(srv.URL+"/v1/predictions", "application/x-ndjson", bytes.NewReader(body))
		if err != nil {
			b.Fatal(err)
		}
		resp.Body.Close()
		close(stop)
		wg.Wait()
		if resp.StatusCode != http.StatusBadRequest {
			b.Fatalf("status %d, want 400", resp.StatusCode)
		}
		worst = max(worst, float64(peak-min(peak, idle.HeapInuse))/(1<<20))
	}
	b.ReportMetric(worst, "peak-heap-MiB-above-idle")
	b.ReportMetric(worst*(1<<20)/DefaultMaxBodyBytes, "peak/body-limit")
}
