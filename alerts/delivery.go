package alerts

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"slices"
	"sync"
	"time"
)

// maxUndelivered bounds the dead-letter list kept for GET /v1/alerts.
const maxUndelivered = 100

// Undelivered is a notification given up after its last attempt.
type Undelivered struct {
	Notifier string    `json:"notifier"`
	At       time.Time `json:"at"`
	Error    string    `json:"error"`
	Alerts   []string  `json:"alerts"` // keys
	States   []State   `json:"states"`
}

// dispatcher delivers alert notices: one bounded queue and worker per
// notifier, resends of firing alerts to the notifiers that want them
// repeated, and the list of notifications given up on. It knows nothing of
// rules or the store; the manager gives it two hooks.
type dispatcher struct {
	queues  []*queue
	log     *slog.Logger
	now     func() time.Time
	metrics *metrics // set by the manager once built

	// firing returns the alerts to resend (none unless this replica
	// evaluates); delivered records that a notifier was told of state
	// changes, so that a restart does not tell it again.
	firing    func() []Alert
	delivered func(ctx context.Context, notifier string, alerts []Alert)

	deadMu sync.Mutex
	dead   []Undelivered

	drain   chan struct{}
	cancel  context.CancelFunc
	workers sync.WaitGroup
}

// newDispatcher checks the notifier configs and builds a queue for each.
func newDispatcher(cfgs []NotifierConfig, client *http.Client, log *slog.Logger, now func() time.Time) (*dispatcher, error) {
	d := &dispatcher{log: log, now: now}
	seen := make(map[string]bool)
	var errs []error
	for i, c := range cfgs {
		c = c.withDefaults()
		for _, fe := range c.check() {
			errs = append(errs, fmt.Errorf("notifier %s: %w", ruleLabel(c.Name, i), fe))
		}
		if seen[c.Name] {
			errs = append(errs, fmt.Errorf("notifier %s: name: repeated", ruleLabel(c.Name, i)))
		}
		seen[c.Name] = true
		if len(errs) > 0 {
			continue
		}
		n, err := c.build(client, now)
		if err != nil {
			errs = append(errs, err)
			continue
		}
		d.queues = append(d.queues, newQueue(d, c, n))
	}
	if err := errors.Join(errs...); err != nil {
		return nil, fmt.Errorf("check notifiers: %w", err)
	}
	return d, nil
}

// names returns the notifiers' names.
func (d *dispatcher) names() []string {
	out := make([]string, len(d.queues))
	for i, q := range d.queues {
		out[i] = q.name
	}
	return out
}

// start runs one worker per queue until stop, or until ctx ends.
func (d *dispatcher) start(ctx context.Context) {
	wctx, cancel := context.WithCancel(ctx)
	d.cancel = cancel
	d.drain = make(chan struct{})
	for _, q := range d.queues {
		d.workers.Add(1)
		go func() {
			defer d.workers.Done()
			q.run(wctx, d.drain)
		}()
	}
}

// stop delivers what the queues hold and stops the workers, giving up on
// what is left when ctx ends.
func (d *dispatcher) stop(ctx context.Context) error {
	close(d.drain)
	flushed := make(chan struct{})
	go func() {
		d.workers.Wait()
		close(flushed)
	}()
	var err error
	select {
	case <-flushed:
	case <-ctx.Done():
		err = fmt.Errorf("deliver queued notifications: %w", context.Cause(ctx))
		d.cancel()
		<-flushed
	}
	d.cancel()
	return err
}

// notify queues a state change (firing or resolved) to every notifier.
func (d *dispatcher) notify(a Alert) {
	for _, q := range d.queues {
		q.push(queued{alert: a, tracked: true})
	}
}

// owed queues the notice of in to every notifier that still needs it.
func (d *dispatcher) owed(in *instance) {
	for _, q := range d.queues {
		if in.owes(q.name) {
			q.push(queued{alert: in.notice(), tracked: true})
		}
	}
}

// owesAny reports whether some notifier still needs a notice of in.
func (d *dispatcher) owesAny(in *instance) bool {
	return slices.ContainsFunc(d.queues, func(q *queue) bool { return in.owes(q.name) })
}

// resend queues the firing alerts to every notifier that wants them
// repeated.
func (d *dispatcher) resend() {
	var alerts []Alert
	for _, q := range d.queues {
		if q.cfg.ResendInterval <= 0 {
			continue
		}
		if alerts == nil {
			alerts = d.firing()
		}
		for _, a := range alerts {
			q.push(queued{alert: a})
		}
	}
}

// giveUp records a notification abandoned after its last attempt.
func (d *dispatcher) giveUp(n string, alerts []Alert, err error) {
	u := Undelivered{Notifier: n, At: d.now().UTC(), Error: err.Error()}
	for _, a := range alerts {
		u.Alerts = append(u.Alerts, a.Key)
		u.States = append(u.States, a.State)
	}
	d.log.Error("notification undelivered", "notifier", n, "alerts", u.Alerts, "err", err)
	d.deadMu.Lock()
	d.dead = append(d.dead, u)
	if len(d.dead) > maxUndelivered {
		d.dead = slices.Delete(d.dead, 0, len(d.dead)-maxUndelivered)
	}
	d.deadMu.Unlock()
}

// undelivered returns a copy of the dead letters, oldest first.
func (d *dispatcher) undelivered() []Undelivered {
	d.deadMu.Lock()
	defer d.deadMu.Unlock()
	return append([]Undelivered{}, d.dead...)
}
