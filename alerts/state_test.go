package alerts

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"slices"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/windows/store"
)

// Views of the fraud class in the current day: recall 0.40 of 100 (surely
// below 0.8), 0.95 of 100 (surely not), and 10 of 20 (below min_count).
var (
	badRecall     = binaryRows(9000, 30, 60, 40)
	goodRecall    = binaryRows(9000, 30, 5, 95)
	unknownRecall = binaryRows(9000, 30, 10, 10)
)

func floorRule(fireAfter, resolveAfter int) Rule {
	return Rule{
		Name: "fraud-recall-floor", Kind: KindFloor, Model: "card-fraud", Window: "1d",
		Metric: "recall", Classes: []string{"fraud"}, Threshold: 0.8,
		FireAfter: fireAfter, ResolveAfter: resolveAfter,
		// Never due during a test: evaluations are driven by hand.
		Schedule: "0 0 1 1 *", Labels: map[string]string{"team": "payments-risk"},
	}
}

var floorKey = instanceKey("fraud-recall-floor", "card-fraud", "fraud", "")

// TestHysteresis walks one alert through its states with fire_after 3 and
// resolve_after 2, with evaluation times set by hand, and checks the
// history the store kept.
func TestHysteresis(t *testing.T) {
	b := setup(t)
	m := b.manager(t, b.options(floorRule(3, 2)))
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Minute) }
	steps := []struct {
		rows [][]int64
		want State
	}{
		{badRecall, StatePending},     // 1: met once
		{badRecall, StatePending},     // 2: met twice
		{unknownRecall, StatePending}, // 3: too little data holds the count
		{badRecall, StateFiring},      // 4: met a third time
		{goodRecall, StateFiring},     // 5: clear once
		{unknownRecall, StateFiring},  // 6: holds
		{goodRecall, StateResolved},   // 7: clear twice
		{goodRecall, StateInactive},   // 8
		{badRecall, StatePending},     // 9: a new episode
		{goodRecall, StateInactive},   // 10: pending ends without firing
	}
	for i, s := range steps {
		b.views.set(t, "card-fraud", dayWindow, binary, s.rows, nil)
		evaluate(t, m, at(i+1))
		recs, err := b.st.Alerts(context.Background())
		if err != nil {
			t.Fatal(err)
		}
		if len(recs) != 1 || recs[0].Key != floorKey {
			t.Fatalf("step %d: stored alerts %v, want one for %s", i+1, recs, floorKey)
		}
		if got := State(recs[0].State); got != s.want {
			t.Errorf("step %d at %s: state %s, want %s", i+1, at(i+1).Format("15:04"), got, s.want)
		}
	}
	in, err := decodeRecord(mustAlerts(t, b)[0])
	if err != nil {
		t.Fatal(err)
	}
	if !in.ActiveAt.Equal(at(9)) {
		t.Errorf("active since %s, want %s", in.ActiveAt, at(9))
	}
	hist, err := b.st.AlertHistory(context.Background(), t0, t0.Add(time.Hour), 0)
	if err != nil {
		t.Fatal(err)
	}
	type change struct {
		state State
		at    time.Time
	}
	var got []change
	for _, h := range hist {
		got = append(got, change{State(h.State), h.UpdatedAt})
	}
	want := []change{
		{StateInactive, at(10)}, {StatePending, at(9)}, {StateInactive, at(8)},
		{StateResolved, at(7)}, {StateFiring, at(4)}, {StatePending, at(1)},
	}
	if !slices.EqualFunc(got, want, func(a, b change) bool { return a.state == b.state && a.at.Equal(b.at) }) {
		t.Fatalf("history (newest first) = %v\nwant %v", got, want)
	}
	resolved, err := decodeRecord(hist[3])
	if err != nil {
		t.Fatal(err)
	}
	if !resolved.StartsAt.Equal(at(4)) || !resolved.EndsAt.Equal(at(7)) {
		t.Errorf("resolved episode %s–%s, want %s–%s", resolved.StartsAt, resolved.EndsAt, at(4), at(7))
	}
}

func mustAlerts(tb testing.TB, b *bundle) []store.AlertRecord {
	tb.Helper()
	recs, err := b.st.Alerts(context.Background())
	if err != nil {
		tb.Fatal(err)
	}
	return recs
}

// hook is an httptest webhook receiver that hands each payload to a
// channel.
type hook struct {
	srv      *httptest.Server
	payloads chan WebhookPayload
}

func newHook(tb testing.TB) *hook {
	tb.Helper()
	h := &hook{payloads: make(chan WebhookPayload, 100)}
	h.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		var p WebhookPayload
		if err := json.Unmarshal(body, &p); err != nil {
			tb.Errorf("webhook body %q: %v", body, err)
		}
		h.payloads <- p
	}))
	tb.Cleanup(h.srv.Close)
	return h
}

func (h *hook) config() NotifierConfig {
	return NotifierConfig{Name: "risk-hook", Type: TypeWebhook, URL: Secret(h.srv.URL + "/hook"), RetryWait: time.Millisecond}
}

// next returns the next payload's only alert.
func (h *hook) next(tb testing.TB) Alert {
	tb.Helper()
	p := waitFor(tb, h.payloads, 10*time.Second, "a webhook payload")
	if len(p.Alerts) != 1 {
		tb.Fatalf("payload with %d alerts, want 1: %+v", len(p.Alerts), p)
	}
	return p.Alerts[0]
}

func start(tb testing.TB, m *Manager) {
	tb.Helper()
	if err := m.Start(context.Background()); err != nil {
		tb.Fatalf("Start: %v", err)
	}
	tb.Cleanup(func() { _ = m.Stop(context.Background()) })
}

func stop(tb testing.TB, m *Manager) {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if err := m.Stop(ctx); err != nil {
		tb.Fatalf("Stop: %v", err)
	}
}

// TestRestartKeepsFiring: a restarted daemon reloads a firing alert from
// the store, keeps its start time, and does not notify it again; the next
// notification after the restart is its resolution.
func TestRestartKeepsFiring(t *testing.T) {
	b := setup(t)
	h := newHook(t)
	opts := b.options(floorRule(1, 1))
	opts.Notifiers = []NotifierConfig{h.config()}
	m1 := b.manager(t, opts)
	start(t, m1)
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m1, t0)
	a := h.next(t)
	if a.State != StateFiring || !a.StartsAt.Equal(t0) {
		t.Fatalf("first notice: %s from %s, want firing from %s", a.State, a.StartsAt, t0)
	}
	stop(t, m1)

	b.reopen(t)
	opts.Store, opts.Registerer = b.st, b.reg
	m2 := b.manager(t, opts)
	start(t, m2)
	if in := m2.instanceOf(floorKey); in == nil || in.State != StateFiring || !in.StartsAt.Equal(t0) {
		t.Fatalf("after restart: %+v, want firing since %s", in, t0)
	}
	evaluate(t, m2, t0.Add(time.Minute))
	b.views.set(t, "card-fraud", dayWindow, binary, goodRecall, nil)
	evaluate(t, m2, t0.Add(2*time.Minute))
	a = h.next(t) // a second firing notice would arrive here first
	if a.State != StateResolved || !a.StartsAt.Equal(t0) || !a.EndsAt.Equal(t0.Add(2*time.Minute)) {
		t.Fatalf("notice after restart: %s %s–%s, want resolved %s–%s", a.State, a.StartsAt, a.EndsAt, t0, t0.Add(2*time.Minute))
	}
	if got := testutil.ToFloat64(m2.metrics.leader); got != 1 {
		t.Errorf("classwatch_alert_evaluator_leader = %g, want 1", got)
	}
}

// TestRestartSendsLostNotice: an alert that fired but whose notice was
// never delivered (the daemon died first) is notified after the restart,
// once.
func TestRestartSendsLostNotice(t *testing.T) {
	b := setup(t)
	h := newHook(t)
	opts := b.options(floorRule(1, 1))
	opts.Notifiers = []NotifierConfig{h.config()}
	m1 := b.manager(t, opts) // never started: its queue is never sent
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m1, t0)

	b.reopen(t)
	opts.Store, opts.Registerer = b.st, b.reg
	m2 := b.manager(t, opts)
	start(t, m2)
	if a := h.next(t); a.State != StateFiring || !a.StartsAt.Equal(t0) {
		t.Fatalf("notice after restart: %s from %s, want firing from %s", a.State, a.StartsAt, t0)
	}
	evaluate(t, m2, t0.Add(time.Minute))
	b.views.set(t, "card-fraud", dayWindow, binary, goodRecall, nil)
	evaluate(t, m2, t0.Add(2*time.Minute))
	if a := h.next(t); a.State != StateResolved {
		t.Fatalf("next notice: %s, want resolved (no second firing)", a.State)
	}
}

// TestRemovedRuleResolves: a firing alert whose rule left the config is
// resolved, and its notifier told, when the new config is loaded.
func TestRemovedRuleResolves(t *testing.T) {
	b := setup(t)
	h := newHook(t)
	opts := b.options(floorRule(1, 1))
	opts.Notifiers = []NotifierConfig{h.config()}
	m1 := b.manager(t, opts)
	start(t, m1)
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m1, t0)
	if a := h.next(t); a.State != StateFiring {
		t.Fatalf("first notice %s, want firing", a.State)
	}
	stop(t, m1)

	b.reopen(t)
	b.now.set(t0.Add(time.Hour))
	opts.Store, opts.Registerer = b.st, b.reg
	opts.Rules = nil
	m2 := b.manager(t, opts)
	start(t, m2)
	a := h.next(t)
	if a.State != StateResolved || !a.EndsAt.Equal(t0.Add(time.Hour)) {
		t.Fatalf("notice: %s ending %s, want resolved at %s", a.State, a.EndsAt, t0.Add(time.Hour))
	}
	if got := State(mustAlerts(t, b)[0].State); got != StateInactive {
		t.Errorf("stored state %s, want inactive", got)
	}
}

// TestTakeOver: a second replica evaluates only once the first lost the
// evaluator lock, and continues from the stored state.
func TestTakeOver(t *testing.T) {
	b := setup(t)
	ctx := context.Background()
	spy := &leaseSpy{Store: b.st}
	opts1 := b.options(floorRule(1, 1))
	opts1.Store = spy
	m1 := b.manager(t, opts1)
	start(t, m1)
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m1, t0)

	opts := b.options(floorRule(1, 1))
	opts.Registerer = nil
	m2 := b.manager(t, opts)
	start(t, m2)
	if m2.lead(ctx) {
		t.Fatal("second replica leads while the first holds the lock")
	}
	// The first replica's lock goes (its session died); the second takes
	// it at its next scheduled time and finds the alert firing.
	if err := spy.leases[0].Release(ctx); err != nil {
		t.Fatal(err)
	}
	if !m2.lead(ctx) {
		t.Fatal("second replica did not take the free lock")
	}
	if in := m2.instanceOf(floorKey); in == nil || in.State != StateFiring || !in.StartsAt.Equal(t0) {
		t.Fatalf("taken over state: %+v, want firing since %s", in, t0)
	}
	if m1.lead(ctx) {
		t.Fatal("first replica still leads after losing its lock")
	}
	if m1.instanceOf(floorKey) != nil {
		t.Error("first replica kept its alert state after losing the lock")
	}
}

// leaseSpy is a real store that keeps the leases it hands out, so that a
// test can end one behind its holder's back, as a dying session would.
type leaseSpy struct {
	Store
	leases []store.Lease
}

func (s *leaseSpy) TryLead(ctx context.Context, name string) (store.Lease, error) {
	l, err := s.Store.TryLead(ctx, name)
	if l != nil {
		s.leases = append(s.leases, l)
	}
	return l, err
}

// TestMissingWindowHolds: when a rule on all models cannot read a model's
// window (the tracker does not know it yet), that model's alerts keep
// their state rather than resolving.
func TestMissingWindowHolds(t *testing.T) {
	b := setup(t)
	r := floorRule(1, 1)
	r.Model = AllModels
	m := b.manager(t, b.options(r))
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m, t0)
	b.views.mu.Lock()
	clear(b.views.m)
	b.views.mu.Unlock()
	evaluate(t, m, t0.Add(time.Minute))
	if in := m.instanceOf(floorKey); in == nil || in.State != StateFiring || !in.EvaluatedAt.Equal(t0) {
		t.Errorf("alert without a window: %+v, want still firing as evaluated at %s", in, t0)
	}
}

// TestUncoveredInstanceResolves: an alert of a class the rule no longer
// covers (its classes changed across a restart) counts as clear.
func TestUncoveredInstanceResolves(t *testing.T) {
	b := setup(t)
	drop := Rule{Name: "recall-drop", Kind: KindDrop, Model: "card-fraud", Window: "1d",
		Classes: []string{"fraud"}, Reference: Reference{Window: "7d-matured"}, Schedule: "0 0 1 1 *"}
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	b.views.set(t, "card-fraud", weekWindow, binary, binaryRows(60000, 200, 100, 900), nil)
	m1 := b.manager(t, b.options(drop))
	evaluate(t, m1, t0)
	key := instanceKey("recall-drop", "card-fraud", "fraud", "")
	if in := m1.instanceOf(key); in == nil || in.State != StateFiring {
		t.Fatalf("before: %+v, want firing", in)
	}

	b.reopen(t)
	drop.Classes = []string{"legit"}
	m2 := b.manager(t, b.options(drop))
	evaluate(t, m2, t0.Add(time.Minute))
	in := m2.instanceOf(key)
	if in == nil || in.State != StateResolved || in.Result.Reason == "" || in.Annotations["summary"] == "" {
		t.Fatalf("after: %+v, want resolved with a reason and a summary", in)
	}
}

// waitNotified waits until the stored alert key records that notifier was
// told state.
func waitNotified(tb testing.TB, st Store, key, notifier string, state State) {
	tb.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		recs, err := st.Alerts(context.Background())
		if err != nil {
			tb.Fatal(err)
		}
		for _, rec := range recs {
			if rec.Key != key {
				continue
			}
			in, err := decodeRecord(rec)
			if err != nil {
				tb.Fatal(err)
			}
			if in.Notified[notifier].State == state {
				return
			}
		}
		if time.Now().After(deadline) {
			tb.Fatalf("alert %s never recorded notifier %s told %s", key, notifier, state)
		}
		time.Sleep(10 * time.Millisecond)
	}
}
