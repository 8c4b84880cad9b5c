package main

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
)

// The stream the harness's daemon consumes.
const (
	streamName  = "CWSTREAM"
	predSubject = "cwstream.predictions"
	labSubject  = "cwstream.labels"
	durable     = "cwstream"
)

// run is one harness run's resources.
type harness struct {
	o        options
	progress io.Writer
	t        traffic
	d        *loadkit.Daemon
	js       jetstream.JetStream
	dbURL    string
}

// runHarness sets everything up, runs the phases and tears down.
func runHarness(ctx context.Context, o options, progress io.Writer) (rep *report, err error) {
	dir, err := os.MkdirTemp("", "cwstream-")
	if err != nil {
		return nil, err
	}
	var cleanups []func() error
	defer func() {
		for i := len(cleanups) - 1; i >= 0; i-- {
			err = errors.Join(err, cleanups[i]())
		}
		if o.Keep {
			fmt.Fprintln(progress, "kept", dir)
		} else {
			err = errors.Join(err, os.RemoveAll(dir))
		}
	}()
	dbURL, drop, err := createDatabase(ctx, o.DatabaseURL)
	if err != nil {
		return nil, err
	}
	if !o.Keep {
		cleanups = append(cleanups, drop)
	}
	natsURL := o.natsURL
	if natsURL == "" {
		var stop func()
		if natsURL, stop, err = startNATS(ctx, dir); err != nil {
			return nil, err
		}
		cleanups = append(cleanups, func() error { stop(); return nil })
	}
	binary := o.Binary
	if binary == "" {
		fmt.Fprintln(progress, "building the daemon")
		if binary, err = loadkit.BuildDaemon(ctx, dir); err != nil {
			return nil, err
		}
	}
	cfg, err := writeConfig(dir, o, dbURL, natsURL)
	if err != nil {
		return nil, err
	}
	h := &harness{o: o, progress: progress, dbURL: dbURL, t: traffic{
		n: o.N, models: o.Models, labeled: int(o.LabelFraction * float64(o.N)), seed: o.Seed,
		end: time.Now().Add(-10 * time.Minute), span: 12 * time.Hour,
	}}
	// /readyz includes the stream source.
	if h.d, err = loadkit.StartDaemon(ctx, binary, cfg, filepath.Join(dir, "daemon.log")); err != nil {
		return nil, err
	}
	cleanups = append(cleanups, func() error { _ = h.d.Stop(); return nil })
	nc, err := nats.Connect(natsURL)
	if err != nil {
		return nil, fmt.Errorf("connect to nats: %w", err)
	}
	cleanups = append(cleanups, func() error { nc.Close(); return nil })
	if h.js, err = jetstream.New(nc); err != nil {
		return nil, err
	}
	return h.phases(ctx)
}

// writeConfig writes the daemon's config: three model sets, ingest limits
// that let every client's batch run at once, and the stream source.
func writeConfig(dir string, o options, dbURL, natsURL string) (string, error) {
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %s\ndatabase: %q\nmodels:\n", filepath.Join(dir, "data"), dbURL)
	for _, set := range []string{"h", "s", "o", "w"} {
		for m := range o.Models {
			fmt.Fprintf(&b, "  - {name: %s-dock-%d, classes: [%s]}\n", set, m+1, strings.Join(parcelClasses, ", "))
		}
	}
	fmt.Fprintf(&b, "ingest: {max_body_bytes: 64MiB, max_in_flight: %d, queue_wait: 2m, max_future: 0}\n", o.Clients)
	fmt.Fprintf(&b, "sources:\n  - {kind: nats, url: %q, stream: %s, predictions_subject: %s, labels_subject: %s, durable: %s, workers: %d, fetch_messages: %d, ack_wait: 5m, nak_delay: 1s}\n",
		natsURL, streamName, predSubject, labSubject, durable, o.Clients, 2*o.Clients)
	path := filepath.Join(dir, "classwatch.yml")
	return path, os.WriteFile(path, []byte(b.String()), 0o600)
}

// phases runs the four measured phases, the check and the overload.
func (h *harness) phases(ctx context.Context) (*report, error) {
	rep := &report{opts: h.o}
	preds, labs := h.t.batches(h.o.Batch, false), h.t.batches(h.o.Batch, true)
	rep.predictions, rep.labels = lines(preds), lines(labs)
	fmt.Fprintf(h.progress, "%d predictions and %d labels per path, %d-line batches, %d clients\n",
		rep.predictions, rep.labels, h.o.Batch, h.o.Clients)
	if err := h.warmUp(ctx); err != nil {
		return rep, err
	}
	var err error
	if rep.httpPred, err = h.pushHTTP(ctx, "/v1/predictions", preds, false); err != nil {
		return rep, err
	}
	if rep.streamPred, err = h.pushStream(ctx, predSubject, "s", preds, false); err != nil {
		return rep, err
	}
	if rep.streamLab, err = h.pushStream(ctx, labSubject, "s", labs, true); err != nil {
		return rep, err
	}
	if rep.httpLab, err = h.pushHTTP(ctx, "/v1/labels", labs, true); err != nil {
		return rep, err
	}
	if rep.checked, err = h.check(ctx); err != nil {
		return rep, err
	}
	if h.o.overload > 0 {
		if rep.overload, err = h.overload(ctx, rep.streamPred.rate()); err != nil {
			return rep, err
		}
	}
	rep.counters, err = h.counters(ctx)
	return rep, err
}

// counters reads the daemon's stream counters, summed over labels.
func (h *harness) counters(ctx context.Context) (map[string]float64, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, h.d.Base+"/metrics", nil)
	if err != nil {
		return nil, err
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	out := map[string]float64{}
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		line := sc.Text()
		if !strings.HasPrefix(line, "classwatch_jetstream_") || strings.Contains(line, "_bucket") {
			continue
		}
		name, rest, _ := strings.Cut(line, " ")
		labels := ""
		if i := strings.IndexByte(name, '{'); i >= 0 {
			name, labels = name[:i], name[i:]
		}
		if strings.Contains(labels, "reason=") {
			name += labels[strings.Index(labels, "reason="):]
			name = strings.TrimSuffix(name, "}")
		}
		var v float64
		if _, err := fmt.Sscan(rest, &v); err == nil {
			out[name] += v
		}
	}
	return out, sc.Err()
}

// warmUp sends a little traffic (models w-dock-*) of the same time span
// both ways and refreshes the planner statistics, so that neither path's
// first phase pays the store's first-use costs (new day partitions,
// statement preparation, tables analyzed while empty).
func (h *harness) warmUp(ctx context.Context) error {
	fmt.Fprintln(h.progress, "warming up")
	w := h.t
	w.n, w.labeled = 200*h.o.Models, 200*h.o.Models
	for _, labels := range []bool{false, true} {
		bs := w.batches(100, labels)
		half := len(bs) / 2
		path, subject := "/v1/predictions", predSubject
		if labels {
			path, subject = "/v1/labels", labSubject
		}
		for _, b := range bs[:half] {
			if err := h.post(ctx, path, w.body("w", b, labels), b.count); err != nil {
				return err
			}
		}
		if _, err := h.pushStream(ctx, subject, "w", bs[half:], labels); err != nil {
			return err
		}
	}
	return analyze(ctx, h.dbURL)
}

// phase is one measured transfer.
type phase struct {
	lines   int
	took    time.Duration
	publish time.Duration // stream phases: how long publishing took
	maxLag  uint64        // stream phases: the most messages pending
}

func (p phase) rate() float64 { return float64(p.lines) / p.took.Seconds() }

// pushHTTP posts the batches from the clients, retrying 503s, and checks
// every answer accounts for its lines.
func (h *harness) pushHTTP(ctx context.Context, path string, bs []batch, labels bool) (phase, error) {
	fmt.Fprintf(h.progress, "HTTP %s\n", path)
	start := time.Now()
	errs, finished := h.fanOut(ctx, bs, func(b batch) error {
		return h.post(ctx, path, h.t.body("h", b, labels), b.count)
	})
	<-finished
	var err error
	select {
	case err = <-errs:
	default:
	}
	if err = errors.Join(err, ctx.Err()); err != nil {
		return phase{}, err
	}
	return phase{lines: lines(bs), took: time.Since(start)}, nil
}

// fanOut hands the batches to h.o.Clients goroutines that run send on
// each, and closes finished once they all returned. A goroutine stops at
// its first error, which goes to errs; handing out stops when ctx ends.
func (h *harness) fanOut(ctx context.Context, bs []batch, send func(batch) error) (errs <-chan error, finished <-chan struct{}) {
	work := make(chan batch)
	errc := make(chan error, h.o.Clients)
	done := make(chan struct{})
	var wg sync.WaitGroup
	for range h.o.Clients {
		wg.Go(func() {
			for b := range work {
				if err := send(b); err != nil {
					errc <- err
					return
				}
			}
		})
	}
	go func() {
		defer close(work)
		for _, b := range bs {
			select {
			case work <- b:
			case <-ctx.Done():
				return
			}
		}
	}()
	go func() { wg.Wait(); close(done) }()
	return errc, done
}

// post sends one body until it is answered 200 with every line counted.
func (h *harness) post(ctx context.Context, path string, body []byte, count int) error {
	for {
		req, err := http.NewRequestWithContext(ctx, http.MethodPost, h.d.Base+path, bytes.NewReader(body))
		if err != nil {
			return err
		}
		req.Header.Set("Content-Type", "application/x-ndjson")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			return err
		}
		var ans struct {
			Accepted, Duplicates int
			Rejected             []struct{ Line int }
			Error                string
		}
		err = jsonDecode(resp.Body, &ans)
		resp.Body.Close()
		switch {
		case resp.StatusCode == http.StatusServiceUnavailable:
			time.Sleep(100 * time.Millisecond)
			continue
		case err != nil || resp.StatusCode != http.StatusOK:
			return fmt.Errorf("POST %s: status %d %s %v", path, resp.StatusCode, ans.Error, err)
		case ans.Accepted+ans.Duplicates != count:
			return fmt.Errorf("POST %s: %d accepted, %d duplicates, %d rejected of %d lines", path, ans.Accepted, ans.Duplicates, len(ans.Rejected), count)
		}
		return nil
	}
}
