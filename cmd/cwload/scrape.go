package main

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
)

// scrapeResults are the figures of the scrape benchmark.
type scrapeResults struct {
	Models, Classes, Windows int
	Predictions, Labels      int
	// Setup are the phases that pushed the traffic.
	Setup    []phase
	Variants []scrapeVariant
	// RSS is the daemon's RSS after the scrapes.
	RSS int64
}

// scrapeVariant is one way of scraping and its timings.
type scrapeVariant struct {
	Name           string
	Accept         string
	AcceptEncoding string
	ContentType    string
	Scrapes        int
	// P50, P95 and Max time a scrape from sending the request to reading
	// the last byte of the body.
	P50, P95, Max time.Duration
	// WireBytes is the body as sent, Bytes uncompressed.
	WireBytes, Bytes int
	// Samples counts every sample line; Confusion those of
	// classwatch_confusion, which the contract exports for every cell.
	Samples, Confusion int
	// DaemonCPU is the daemon's CPU time per timed scrape.
	DaemonCPU time.Duration
}

// prometheusAccept is the Accept header Prometheus 2.x scrapes with
// (from memory of its scrape code; OpenMetrics preferred, text accepted).
const prometheusAccept = "application/openmetrics-text;version=1.0.0,application/openmetrics-text;version=0.0.1;q=0.75,text/plain;version=0.0.4;q=0.5,*/*;q=0.1"

// scrapeWarmups are untimed scrapes before each variant.
const scrapeWarmups = 2

// scrapeWindows are four windows that all hold traffic of the scrape
// scenario.
func scrapeWindows() []windows.Window {
	return []windows.Window{
		{Name: "1h", Length: time.Hour},
		{Name: "6h", Length: 6 * time.Hour},
		{Name: "1d", Length: 24 * time.Hour},
		{Name: "7d-matured", Length: 168 * time.Hour, Lag: 72 * time.Hour},
	}
}

// runScrape runs the scrape benchmark: a daemon with scrapeModels models of
// scrapeClasses classes and four windows, traffic in every window of every
// model, then timed GET /metrics.
func (h *harness) runScrape(ctx context.Context) (_ *scrapeResults, err error) {
	o := h.opts
	ws := scrapeWindows()
	// A third of the predictions in the last hour, so that every class
	// of every model shows up in the 1h window, the rest spread back over
	// ten days into the 7d-matured window. Zones keep clear of window
	// edges, as the watermark lies up to a bucket after end.
	zones := []zone{
		{share: 0.45, from: 235 * time.Hour, to: 80 * time.Hour},
		{share: 0.25, from: 23 * time.Hour, to: time.Hour},
		{share: 0.30, from: 50 * time.Minute, to: 0},
	}
	end := time.Now().Add(-5 * time.Minute)
	sc := newScenario(o.Seed+1, "sorter", o.scrapeModels, o.scrapeClasses, o.scrapeEvents, end, zones, 1)
	res := &scrapeResults{Models: o.scrapeModels, Classes: o.scrapeClasses, Windows: len(ws)}
	fmt.Fprintf(h.progress, "scrape benchmark: %d models × %d classes × %d windows\n", res.Models, res.Classes, res.Windows)

	d, err := h.startDaemon(ctx, "scrape", sc, ws)
	if err != nil {
		return res, err
	}
	defer func() {
		if err != nil {
			err = errors.Join(err, d.LogTail())
		}
		err = errors.Join(err, d.Stop())
	}()
	rss := sampleRSS(d.PID, time.Second)
	defer func() { err = errors.Join(err, rss.close()) }()
	cl := newClient(d.Base, o.Clients)
	defer cl.close()

	for _, kind := range []string{"predictions", "labels"} {
		refs := sc.predictionBatches(o.Batch)
		if kind == "labels" {
			refs = sc.labelBatches(o.Batch)
		}
		bodies := make([][]byte, len(refs))
		for i, b := range refs {
			for _, j := range b.list {
				e := sc.event(b.model, j)
				if kind == "labels" {
					bodies[i] = sc.appendLabel(bodies[i], &e)
				} else {
					bodies[i] = sc.appendPrediction(bodies[i], &e)
				}
			}
		}
		ph, err := h.httpPhase(ctx, "scrape setup "+kind, cl, d, rss, "/v1/"+kind, bodies,
			func(i int) int { return len(refs[i].list) })
		if err != nil {
			return res, err
		}
		res.Setup = append(res.Setup, ph)
	}
	res.Predictions, res.Labels = res.Setup[0].Events, res.Setup[1].Events

	for _, v := range []scrapeVariant{
		{Name: "text", Accept: "text/plain;version=0.0.4"},
		{Name: "prometheus", Accept: prometheusAccept, AcceptEncoding: "gzip"},
	} {
		v, err := h.timeScrapes(ctx, cl, d.PID, v)
		if err != nil {
			return res, err
		}
		res.Variants = append(res.Variants, v)
		fmt.Fprintf(h.progress, "scrape %-10s %d samples, %d bytes on the wire: p50 %v, max %v\n",
			v.Name, v.Samples, v.WireBytes, v.P50.Round(time.Microsecond*100), v.Max.Round(time.Microsecond*100))
		if want := res.Models * res.Windows * res.Classes * res.Classes; v.Confusion != want {
			return res, fmt.Errorf("scrape %s: %d classwatch_confusion samples, want %d (every cell of every window)", v.Name, v.Confusion, want)
		}
	}
	res.RSS, _, err = memory(d.PID)
	return res, err
}

// timeScrapes scrapes /metrics scrapeWarmups times untimed, then
// opts.scrapes times timed, and describes the last body.
func (h *harness) timeScrapes(ctx context.Context, cl *client, pid int, v scrapeVariant) (scrapeVariant, error) {
	var (
		took       []time.Duration
		body       []byte
		cpu0, cpu1 time.Duration
		err        error
	)
	for i := range scrapeWarmups + h.opts.scrapes {
		if i == scrapeWarmups {
			if cpu0, err = processCPU(pid); err != nil {
				return v, err
			}
		}
		req, err := http.NewRequestWithContext(ctx, http.MethodGet, cl.base+"/metrics", nil)
		if err != nil {
			return v, fmt.Errorf("build request: %w", err)
		}
		req.Header.Set("Accept", v.Accept)
		if v.AcceptEncoding != "" {
			req.Header.Set("Accept-Encoding", v.AcceptEncoding)
		}
		start := time.Now()
		resp, err := cl.http.Do(req)
		if err != nil {
			return v, fmt.Errorf("scrape: %w", err)
		}
		body, err = io.ReadAll(resp.Body)
		resp.Body.Close()
		elapsed := time.Since(start)
		if err != nil {
			return v, fmt.Errorf("read scrape: %w", err)
		}
		if resp.StatusCode != http.StatusOK {
			return v, fmt.Errorf("scrape: %s: %s", resp.Status, excerpt(body))
		}
		v.ContentType = resp.Header.Get("Content-Type")
		if i >= scrapeWarmups {
			took = append(took, elapsed)
		}
		if i == scrapeWarmups+h.opts.scrapes-1 && resp.Header.Get("Content-Encoding") == "gzip" {
			v.WireBytes = len(body)
			zr, err := gzip.NewReader(bytes.NewReader(body))
			if err != nil {
				return v, fmt.Errorf("read gzip scrape: %w", err)
			}
			if body, err = io.ReadAll(zr); err != nil {
				return v, fmt.Errorf("read gzip scrape: %w", err)
			}
		}
	}
	if cpu1, err = processCPU(pid); err != nil {
		return v, err
	}
	if v.WireBytes == 0 {
		v.WireBytes = len(body)
	}
	v.Bytes = len(body)
	sc := bufio.NewScanner(bytes.NewReader(body))
	sc.Buffer(make([]byte, 0, 64<<10), 1<<20)
	for sc.Scan() {
		line := sc.Bytes()
		if len(line) == 0 || line[0] == '#' {
			continue
		}
		v.Samples++
		if bytes.HasPrefix(line, []byte("classwatch_confusion{")) {
			v.Confusion++
		}
	}
	if err := sc.Err(); err != nil {
		return v, fmt.Errorf("read scrape lines: %w", err)
	}
	slices.Sort(took)
	v.Scrapes = len(took)
	v.DaemonCPU = (cpu1 - cpu0) / time.Duration(len(took))
	v.P50, v.P95, v.Max = percentile(took, 0.50), percentile(took, 0.95), took[len(took)-1]
	return v, nil
}
