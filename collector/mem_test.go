package collector

import (
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"runtime"
	"runtime/debug"
	rtmetrics "runtime/metrics"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// memPeak samples, every millisecond until stop, the heap in use (live
// and not yet collected objects plus unused heap spans) and the resident
// set size (from /proc/self/statm; 0 where there is none), and returns
// their greatest values.
func memPeak(stop <-chan struct{}) (heap, rss uint64) {
	samples := []rtmetrics.Sample{
		{Name: "/memory/classes/heap/objects:bytes"},
		{Name: "/memory/classes/heap/unused:bytes"},
	}
	t := time.NewTicker(time.Millisecond)
	defer t.Stop()
	for {
		rtmetrics.Read(samples)
		heap = max(heap, samples[0].Value.Uint64()+samples[1].Value.Uint64())
		rss = max(rss, residentBytes())
		select {
		case <-stop:
			return heap, rss
		case <-t.C:
		}
	}
}

// residentBytes reads the resident set size of the process, or 0.
func residentBytes() uint64 {
	data, err := os.ReadFile("/proc/self/statm")
	if err != nil {
		return 0
	}
	f := strings.Fields(string(data))
	if len(f) < 2 {
		return 0
	}
	pages, _ := strconv.ParseUint(f[1], 10, 64)
	return pages * uint64(os.Getpagesize())
}

// xLines reads as left bytes of "x\n" lines.
type xLines struct{ left int }

func (x *xLines) Read(p []byte) (int, error) {
	if x.left == 0 {
		return 0, io.EOF
	}
	n := min(len(p), x.left)
	for i := range n {
		p[i] = "x\n"[(x.left-i)%2]
	}
	x.left -= n
	return n, nil
}

// BenchmarkAllBadBody posts a body of Limits.MaxBodyBytes (8 MiB) of "x"
// lines, every one rejected, through a real HTTP server and reports the peak
// heap in use above the heap before the request, in MiB and as a ratio to
// the body limit (README "Security and limits": at most 2); and the same
// for the resident set size, which counts body buffers mapped outside the
// heap.
func BenchmarkAllBadBody(b *testing.B) {
	st := sqlitestoretest.Open(b, sqlitestore.Options{})
	c, err := New(Options{Store: st, Registerer: prometheus.NewRegistry(),
		Models: []ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}}}})
	if err != nil {
		b.Fatal(err)
	}
	mux := http.NewServeMux()
	c.Register(mux)
	srv := httptest.NewServer(mux)
	defer srv.Close()
	var worstHeap, worstRSS float64
	for b.Loop() {
		runtime.GC()
		debug.FreeOSMemory()
		var idle runtime.MemStats
		runtime.ReadMemStats(&idle)
		idleRSS := residentBytes()
		stop := make(chan struct{})
		var heap, rss uint64
		var wg sync.WaitGroup
		wg.Go(func() { heap, rss = memPeak(stop) })
		// The body is made as it is sent, so that the client's copy does
		// not count.
		req, err := http.NewRequest(http.MethodPost, srv.URL+"/v1/predictions", &xLines{left: DefaultMaxBodyBytes})
		if err != nil {
			b.Fatal(err)
		}
		req.ContentLength = DefaultMaxBodyBytes
		req.Header.Set("Content-Type", "application/x-ndjson")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			b.Fatal(err)
		}
		resp.Body.Close()
		close(stop)
		wg.Wait()
		if resp.StatusCode != http.StatusBadRequest {
			b.Fatalf("status %d, want 400", resp.StatusCode)
		}
		worstHeap = max(worstHeap, float64(heap-min(heap, idle.HeapInuse))/(1<<20))
		worstRSS = max(worstRSS, float64(rss-min(rss, idleRSS))/(1<<20))
	}
	b.ReportMetric(worstHeap, "peak-heap-MiB-above-idle")
	b.ReportMetric(worstRSS, "peak-RSS-MiB-above-idle")
	b.ReportMetric(worstRSS*(1<<20)/DefaultMaxBodyBytes, "peak-RSS/body-limit")
}
