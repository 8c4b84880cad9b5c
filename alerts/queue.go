package alerts

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"
)

// maxBatch bounds the alerts sent in one request.
const maxBatch = 64

// maxRetryWait caps the doubling pause between attempts.
const maxRetryWait = 5 * time.Minute

// queued is one alert waiting for a notifier. tracked notices are state
// changes, recorded in the store once delivered; resends are not.
type queued struct {
	alert   Alert
	tracked bool
}

// queue is one notifier's bounded, drop-oldest queue and its worker. The
// evaluator only ever pushes, which never blocks, so a slow or dead
// receiver cannot hold up evaluation or ingest.
type queue struct {
	name string
	cfg  NotifierConfig
	n    Notifier
	d    *dispatcher

	mu    sync.Mutex
	items []queued
	wake  chan struct{}
}

func newQueue(d *dispatcher, cfg NotifierConfig, n Notifier) *queue {
	return &queue{name: cfg.Name, cfg: cfg, n: n, d: d, wake: make(chan struct{}, 1)}
}

// push appends items, dropping the oldest past the queue's size.
func (q *queue) push(items ...queued) {
	q.mu.Lock()
	q.items = append(q.items, items...)
	drop := len(q.items) - q.cfg.QueueSize
	if drop > 0 {
		q.items = append(q.items[:0], q.items[drop:]...)
	}
	q.d.metrics.queueLength.WithLabelValues(q.name).Set(float64(len(q.items)))
	q.mu.Unlock()
	if drop > 0 {
		q.d.metrics.dropped.WithLabelValues(q.name).Add(float64(drop))
		q.d.log.Warn("notification queue full: dropped the oldest", "notifier", q.name, "dropped", drop)
	}
	select {
	case q.wake <- struct{}{}:
	default:
	}
}

// take removes up to maxBatch items from the front.
func (q *queue) take() []queued {
	q.mu.Lock()
	defer q.mu.Unlock()
	n := min(len(q.items), maxBatch)
	batch := append([]queued(nil), q.items[:n]...)
	q.items = append(q.items[:0], q.items[n:]...)
	q.d.metrics.queueLength.WithLabelValues(q.name).Set(float64(len(q.items)))
	return batch
}

// run delivers until ctx ends, or until drain closes and the queue is
// empty. Notifiers with a resend interval get the firing alerts again on
// each tick.
func (q *queue) run(ctx context.Context, drain <-chan struct{}) {
	var tick <-chan time.Time
	if q.cfg.ResendInterval > 0 {
		t := time.NewTicker(q.cfg.ResendInterval)
		defer t.Stop()
		tick = t.C
	}
	draining := false
	for {
		for batch := q.take(); len(batch) > 0; batch = q.take() {
			q.deliver(ctx, batch)
			if ctx.Err() != nil {
				return
			}
		}
		if draining {
			return
		}
		select {
		case <-ctx.Done():
			return
		case <-drain:
			draining = true
		case <-q.wake:
		case <-tick:
			for _, a := range q.d.firing() {
				q.push(queued{alert: a})
			}
		}
	}
}

// deliver sends one batch, retrying with a doubling pause while the
// notifier says a retry may help. A batch that fails its last attempt is
// given up: logged, counted and listed as undelivered. Either way the
// batch's state changes are recorded as handled, so they are not sent
// again after a restart; a batch cut short by shutdown is not, so it is.
func (q *queue) deliver(ctx context.Context, batch []queued) {
	alerts := make([]Alert, len(batch))
	for i, b := range batch {
		alerts[i] = b.alert
	}
	wait := q.cfg.RetryWait
	var err error
	for attempt := 1; ; attempt++ {
		actx, cancel := context.WithTimeoutCause(ctx, q.cfg.Timeout,
			fmt.Errorf("notifier %s: attempt timed out after %s: %w", q.name, q.cfg.Timeout, context.DeadlineExceeded))
		var retry bool
		retry, err = q.n.Notify(actx, alerts...)
		cancel()
		if err == nil {
			q.d.metrics.sent.WithLabelValues(q.name).Add(float64(len(alerts)))
			break
		}
		if ctx.Err() != nil {
			q.d.log.Warn("notification abandoned at shutdown", "notifier", q.name, "alerts", len(alerts), "err", err)
			return
		}
		if !retry || attempt >= q.cfg.MaxAttempts {
			q.d.metrics.failed.WithLabelValues(q.name).Add(float64(len(alerts)))
			q.d.giveUp(q.name, alerts, fmt.Errorf("after %d attempt(s): %w", attempt, err))
			break
		}
		q.d.log.Debug("notification failed; retrying", "notifier", q.name, "attempt", attempt, "wait", wait, "err", err)
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			q.d.log.Warn("notification abandoned at shutdown", "notifier", q.name, "alerts", len(alerts), "err", errors.Join(err, ctx.Err()))
			return
		case <-t.C:
		}
		wait = min(2*wait, maxRetryWait)
	}
	var tracked []Alert
	for _, b := range batch {
		if b.tracked {
			tracked = append(tracked, b.alert)
		}
	}
	if len(tracked) > 0 {
		q.d.delivered(ctx, q.name, tracked)
	}
}
