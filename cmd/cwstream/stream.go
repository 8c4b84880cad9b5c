package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"time"

	"github.com/nats-io/nats.go"
)

func jsonDecode(r io.Reader, v any) error { return json.NewDecoder(r).Decode(v) }

// lag is the shared consumer's pending and unacknowledged messages.
func (h *harness) lag(ctx context.Context) (pending uint64, ackPending int, err error) {
	ctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	cons, err := h.js.Consumer(ctx, streamName, durable)
	if err != nil {
		return 0, 0, err
	}
	info, err := cons.Info(ctx)
	if err != nil {
		return 0, 0, err
	}
	return info.NumPending, info.NumAckPending, nil
}

// publish sends one message with a Content-Type header and waits for the
// server to store it.
func (h *harness) publish(ctx context.Context, subject string, body []byte) error {
	m := nats.NewMsg(subject)
	m.Header.Set("Content-Type", "application/x-ndjson")
	m.Data = body
	_, err := h.js.PublishMsg(ctx, m)
	return err
}

// pushStream publishes the batches from the clients and waits until the
// consumer has committed them all.
func (h *harness) pushStream(ctx context.Context, subject, set string, bs []batch, labels bool) (phase, error) {
	fmt.Fprintf(h.progress, "stream %s\n", subject)
	start := time.Now()
	errs, published := h.fanOut(ctx, bs, func(b batch) error {
		if err := h.publish(ctx, subject, h.t.body(set, b, labels)); err != nil {
			return fmt.Errorf("publish: %w", err)
		}
		return nil
	})
	var maxLag uint64
	p := phase{lines: lines(bs)}
	for {
		select {
		case err := <-errs:
			return p, err
		case <-ctx.Done():
			return p, ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
		pending, ackPending, err := h.lag(ctx)
		if err != nil {
			return p, err
		}
		maxLag = max(maxLag, pending)
		select {
		case <-published:
			if p.publish == 0 {
				p.publish = time.Since(start)
			}
			if pending == 0 && ackPending == 0 {
				p.took, p.maxLag = time.Since(start), maxLag
				return p, nil
			}
		default:
		}
	}
}

// check compares both model sets' counts (GET /v1/models).
func (h *harness) check(ctx context.Context) (bool, error) {
	var body struct {
		Models []struct {
			Name                 string
			Predictions, Labeled int64
		}
	}
	if _, err := get(ctx, h.d.Base+"/v1/models", &body); err != nil {
		return false, fmt.Errorf("GET /v1/models: %w", err)
	}
	counts := map[string][2]int64{}
	for _, m := range body.Models {
		counts[m.Name] = [2]int64{m.Predictions, m.Labeled}
	}
	var errs []error
	var predictions, labeled int64
	for m := range h.o.Models {
		hc, sc := counts[fmt.Sprintf("h-dock-%d", m+1)], counts[fmt.Sprintf("s-dock-%d", m+1)]
		if hc != sc {
			errs = append(errs, fmt.Errorf("dock %d: HTTP %v, stream %v (predictions, labeled)", m+1, hc, sc))
		}
		predictions += sc[0]
		labeled += sc[1]
	}
	if predictions != int64(h.o.N) || labeled != int64(h.t.labeled) {
		errs = append(errs, fmt.Errorf("stream set holds %d predictions, %d labeled; want %d, %d", predictions, labeled, h.o.N, h.t.labeled))
	}
	return len(errs) == 0, errors.Join(errs...)
}

// overloadResult is the lag under a publish rate of twice the measured
// stream rate.
type overloadResult struct {
	targetLines float64 // lines/s published
	sentLines   int
	publishFor  time.Duration
	samples     []uint64 // pending messages, one per second
	drain       time.Duration
}

// overload publishes predictions of the o-dock-* models at twice rate
// lines/s for the configured time, then waits for the lag to drain.
func (h *harness) overload(ctx context.Context, rate float64) (*overloadResult, error) {
	res := &overloadResult{targetLines: 2 * rate}
	fmt.Fprintf(h.progress, "overload: %.0f lines/s for %s\n", res.targetLines, h.o.overload)
	per := time.Duration(float64(time.Second) * float64(h.o.Batch) / res.targetLines)
	big := traffic{n: int(res.targetLines*h.o.overload.Seconds()) + h.o.Batch*h.o.Models, models: h.o.Models, seed: h.o.Seed + 1, end: h.t.end, span: h.t.span}
	bs := big.batches(h.o.Batch, false)
	start := time.Now()
	nextSample := start
	for i := 0; time.Since(start) < h.o.overload && i < len(bs); i++ {
		if wait := time.Until(start.Add(time.Duration(i) * per)); wait > 0 {
			time.Sleep(wait)
		}
		if err := h.publish(ctx, predSubject, big.body("o", bs[i], false)); err != nil {
			return res, fmt.Errorf("publish: %w", err)
		}
		res.sentLines += bs[i].count
		if time.Now().After(nextSample) {
			pending, _, err := h.lag(ctx)
			if err != nil {
				return res, err
			}
			res.samples = append(res.samples, pending)
			nextSample = nextSample.Add(time.Second)
		}
	}
	res.publishFor = time.Since(start)
	drainStart := time.Now()
	for {
		pending, ackPending, err := h.lag(ctx)
		if err != nil {
			return res, err
		}
		if pending == 0 && ackPending == 0 {
			res.drain = time.Since(drainStart)
			return res, nil
		}
		time.Sleep(50 * time.Millisecond)
	}
}
