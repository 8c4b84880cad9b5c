package alerts

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"slices"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/robfig/cron/v3"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/lease"
)

// LeaseName is the single-evaluator lock the manager takes in the store.
const LeaseName = "alerts"

// ViewFunc returns the current view of one model's named window, and false
// when the model or the window is unknown (the rolling tracker's View).
type ViewFunc func(model, window string) (windows.View, bool)

// Store is what the manager needs from the storage seam; store.Store
// satisfies it.
type Store interface {
	Models(ctx context.Context) ([]store.ModelInfo, error)
	Counts(ctx context.Context, q store.Query) (store.Counts, error)
	SaveAlert(ctx context.Context, rec store.AlertRecord, history bool) error
	Alerts(ctx context.Context) ([]store.AlertRecord, error)
	AlertHistory(ctx context.Context, from, to time.Time, limit int) ([]store.AlertRecord, error)
	TryLead(ctx context.Context, name string) (store.Lease, error)
}

// Options configure a Manager.
type Options struct {
	// Store keeps alert state and history and holds the evaluator lock.
	Store Store
	// View reads the current windows.
	View ViewFunc
	// Watermark returns a model's watermark (the rolling tracker's
	// Watermark); without it a cusum rule's evaluation fails (on all
	// models, it skips them).
	Watermark func(model string) (time.Time, bool)
	// Rules and Notifiers, usually from ParseRules and ParseNotifiers.
	Rules     []Rule
	Notifiers []NotifierConfig
	// Windows, when set, are the configured windows; New then checks that
	// every rule names one of them.
	Windows []windows.Window
	// Confidence is the daemon's confidence level for rules that set none
	// (default 0.95).
	Confidence float64
	// Registerer receives the alert metrics; nil registers nothing.
	Registerer prometheus.Registerer
	// Logger defaults to a logger that discards.
	Logger *slog.Logger
	// Now is the clock (default time.Now).
	Now func() time.Time
	// GeneratorURL is the daemon's external base URL (e.g.
	// "http://classwatch.example:9640"); alerts link to their model's
	// windows under it.
	GeneratorURL string
	// HTTPClient sends notifications (default: a client without a global
	// timeout; each attempt has the notifier's own timeout).
	HTTPClient *http.Client
}

// Manager evaluates the rules on their schedules while it holds the
// evaluator lock, keeps alert state in the store and hands state changes
// to its dispatcher, which delivers them. It is safe for concurrent use.
type Manager struct {
	store        Store
	view         ViewFunc
	watermark    func(model string) (time.Time, bool)
	rules        []*Compiled
	delivery     *dispatcher
	leader       *lease.Leader
	confidence   float64
	log          *slog.Logger
	now          func() time.Time
	generatorURL string
	metrics      *metrics
	// started is when the manager was made: a model that never sent a
	// prediction has had no traffic since then.
	started time.Time

	// evalMu serialises evaluations, state loads and delivery marks: all
	// the writers of alert state. The leader's lock is taken before it.
	evalMu sync.Mutex
	// mu guards instances for readers that must not wait for an evaluation
	// (metrics scrapes, resends). Writers hold evalMu, then mu.
	mu        sync.RWMutex
	instances map[string]*instance
	loaded    bool

	lifeMu  sync.Mutex
	cron    *cron.Cron
	running bool
	stopped bool
}

// New checks the rules and notifiers and builds a Manager; it starts
// nothing.
func New(opts Options) (*Manager, error) {
	if opts.Store == nil || opts.View == nil {
		return nil, errors.New("new alert manager: Store and View are required")
	}
	rules, err := CompileRules(opts.Rules)
	if err != nil {
		return nil, fmt.Errorf("check alert rules: %w", err)
	}
	if len(opts.Windows) > 0 {
		if err := CheckWindows(opts.Rules, opts.Windows); err != nil {
			return nil, fmt.Errorf("check alert rules: %w", err)
		}
	}
	conf := cmp.Or(opts.Confidence, 0.95)
	if !(conf > 0 && conf < 1) {
		return nil, fmt.Errorf("new alert manager: confidence %g outside (0, 1)", conf)
	}
	m := &Manager{
		store:        opts.Store,
		view:         opts.View,
		watermark:    opts.Watermark,
		rules:        rules,
		confidence:   conf,
		log:          cmp.Or(opts.Logger, slog.New(slog.DiscardHandler)),
		now:          opts.Now,
		generatorURL: opts.GeneratorURL,
		instances:    make(map[string]*instance),
	}
	if m.now == nil {
		m.now = time.Now
	}
	m.started = m.now()
	m.delivery, err = newDispatcher(opts.Notifiers, cmp.Or(opts.HTTPClient, &http.Client{}), m.log, m.now)
	if err != nil {
		return nil, err
	}
	m.delivery.firing, m.delivery.delivered = m.firing, m.delivered
	m.leader = lease.New(m.store, LeaseName, lease.Options{Acquired: m.acquired, Lost: m.lost})
	m.metrics = newMetrics(m)
	m.delivery.metrics = m.metrics
	if opts.Registerer != nil {
		if err := m.metrics.register(opts.Registerer); err != nil {
			return nil, fmt.Errorf("register alert metrics: %w", err)
		}
	}
	return m, nil
}

// Start takes the evaluator lock if it is free, starts the notifier queues
// and schedules the rules. Scheduled evaluations run with ctx, the
// daemon's context; a replica without the lock tries again at each
// scheduled time. Start fails only when called a second time.
func (m *Manager) Start(ctx context.Context) error {
	m.lifeMu.Lock()
	defer m.lifeMu.Unlock()
	if m.running || m.stopped {
		return errors.New("start alert manager: already started")
	}
	m.running = true
	m.delivery.start(ctx)

	cl := cronLogger{log: m.log}
	m.cron = cron.New(
		cron.WithLocation(time.UTC),
		cron.WithLogger(cl),
		cron.WithChain(cron.Recover(cl), cron.SkipIfStillRunning(cl)),
	)
	now := m.now().UTC()
	var specs []string
	groups := make(map[string][]*Compiled)
	for _, r := range m.rules {
		if _, ok := groups[r.Schedule]; !ok {
			specs = append(specs, r.Schedule)
		}
		groups[r.Schedule] = append(groups[r.Schedule], r)
	}
	for _, spec := range specs {
		rs := groups[spec]
		j := &scheduledJob{m: m, schedule: rs[0].schedule, rules: rs}
		j.next = j.schedule.Next(now)
		// cron's Job.Run takes no context: the job closes over the daemon's.
		m.cron.Schedule(j.schedule, cron.FuncJob(func() { j.run(ctx) }))
	}
	m.lead(ctx)
	m.cron.Start()
	return nil
}

// Stop stops scheduling, waits for a running evaluation, delivers what the
// notifier queues hold and releases the evaluator lock, giving up on
// whatever is left when ctx ends. It may be called before Start and more
// than once.
func (m *Manager) Stop(ctx context.Context) error {
	m.lifeMu.Lock()
	defer m.lifeMu.Unlock()
	if !m.running || m.stopped {
		m.stopped = true
		return nil
	}
	m.stopped = true
	var errs []error
	select {
	case <-m.cron.Stop().Done():
	case <-ctx.Done():
		errs = append(errs, fmt.Errorf("wait for running evaluations: %w", context.Cause(ctx)))
	}
	if err := m.delivery.stop(ctx); err != nil {
		errs = append(errs, err)
	}
	rctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	if err := m.leader.Release(rctx); err != nil {
		errs = append(errs, fmt.Errorf("release evaluator lock: %w", err))
	}
	m.metrics.leader.Set(0)
	return errors.Join(errs...)
}

// scheduledJob evaluates the rules sharing one schedule. cron runs it with
// SkipIfStillRunning, so run never overlaps itself and next needs no lock.
type scheduledJob struct {
	m        *Manager
	schedule cron.Schedule
	rules    []*Compiled
	// next is the first scheduled time not yet evaluated.
	next time.Time
}

// run evaluates at the latest scheduled time that has come, counting the
// scheduled times passed over (skipped because the previous run was still
// going, or lost to a pause of the process) as missed.
func (j *scheduledJob) run(ctx context.Context) {
	now := j.m.now().UTC()
	at, ticks := now.Truncate(time.Second), 0
	for !j.next.IsZero() && !j.next.After(now) {
		at, j.next = j.next, j.schedule.Next(j.next)
		ticks++
	}
	if ticks > 1 {
		for _, r := range j.rules {
			j.m.metrics.missed.WithLabelValues(r.Name).Add(float64(ticks - 1))
		}
	}
	if !j.m.lead(ctx) {
		return
	}
	if err := j.m.evaluate(ctx, at, j.rules); err != nil && !errors.Is(err, context.Canceled) {
		j.m.log.Error("evaluate alert rules", "at", at, "err", err)
	}
}

// lead reports whether this replica holds the evaluator lock, taking it
// when free (see acquired and lost).
func (m *Manager) lead(ctx context.Context) bool {
	held, err := m.leader.Lead(ctx)
	if err != nil && !errors.Is(err, context.Canceled) {
		m.log.Error("take the alert evaluator lock", "err", err)
	}
	return held
}

// acquired runs when this replica takes the evaluator lock: it loads the
// alert state from the store (another replica may have changed it), and
// queues what the notifiers still need and the firing alerts to resend.
func (m *Manager) acquired(ctx context.Context) error {
	m.evalMu.Lock()
	err := m.load(ctx)
	m.evalMu.Unlock()
	if err != nil {
		return fmt.Errorf("load alert state: %w", err)
	}
	m.metrics.leader.Set(1)
	m.log.Info("took the alert evaluator lock")
	m.delivery.resend()
	return nil
}

// lost runs when the evaluator lock is found lost: the in-memory state is
// dropped, to be loaded again when the lock is next taken.
func (m *Manager) lost(err error) {
	m.log.Warn("lost the alert evaluator lock", "err", err)
	m.metrics.leader.Set(0)
	m.evalMu.Lock()
	m.mu.Lock()
	m.instances, m.loaded = make(map[string]*instance), false
	m.mu.Unlock()
	m.evalMu.Unlock()
}

// load replaces the in-memory state with the store's. Alerts of rules no
// longer configured are retired: a firing one resolves (and notifiers are
// told), a pending one goes inactive. Notices a notifier still needs are
// queued. The caller holds evalMu.
func (m *Manager) load(ctx context.Context) error {
	recs, err := m.store.Alerts(ctx)
	if err != nil {
		return fmt.Errorf("read alert state: %w", err)
	}
	byName := make(map[string]*Compiled, len(m.rules))
	for _, r := range m.rules {
		byName[r.Name] = r
	}
	loaded := make(map[string]*instance, len(recs))
	now := m.now().UTC()
	for _, rec := range recs {
		in, err := decodeRecord(rec)
		if err != nil {
			m.log.Error("skip unreadable alert record", "key", rec.Key, "err", err)
			continue
		}
		if _, ok := byName[in.Rule]; !ok && in.State != StateInactive {
			if in.State == StateFiring {
				in.EndsAt = now
			}
			in.State, in.Met, in.Clear, in.EvaluatedAt = StateInactive, 0, 0, now
			in.Result = Result{Outcome: OutcomeClear, Reason: "rule removed from the config"}
			if err := m.save(ctx, in, true); err != nil {
				return err
			}
			m.log.Info("retired alert of a removed rule", "key", in.Key)
		}
		if m.settled(in) {
			continue
		}
		loaded[in.Key] = in
	}
	m.mu.Lock()
	m.instances, m.loaded = loaded, true
	m.mu.Unlock()
	for _, in := range loaded {
		m.delivery.owed(in)
	}
	return nil
}

// settled reports whether an instance can leave memory: inactive, with no
// notice owed to any notifier.
func (m *Manager) settled(in *instance) bool {
	return in.State == StateInactive && !m.delivery.owesAny(in)
}

// Evaluate evaluates every rule at time at, the scheduled time, and applies
// the results to the alert states. It does not check the evaluator lock:
// the scheduler calls it only while holding it, and so should others. It
// returns the rules that failed, joined; the other rules still count.
func (m *Manager) Evaluate(ctx context.Context, at time.Time) error {
	return m.evaluate(ctx, at, m.rules)
}

func (m *Manager) evaluate(ctx context.Context, at time.Time, rules []*Compiled) error {
	at = at.UTC()
	m.evalMu.Lock()
	defer m.evalMu.Unlock()
	fail := func(err error) error {
		for _, r := range rules {
			m.metrics.evaluations.WithLabelValues(r.Name).Inc()
			m.metrics.failures.WithLabelValues(r.Name).Inc()
		}
		return err
	}
	if !m.loaded {
		if err := m.load(ctx); err != nil {
			return fail(err)
		}
	}
	models, err := m.store.Models(ctx)
	if err != nil {
		return fail(fmt.Errorf("list models: %w", err))
	}
	env := m.env(at, models)
	var errs []error
	for _, r := range rules {
		m.metrics.evaluations.WithLabelValues(r.Name).Inc()
		fs, read, err := r.Evaluate(ctx, env)
		if err == nil {
			err = m.apply(ctx, r, at, fs, read)
		}
		if err != nil {
			m.metrics.failures.WithLabelValues(r.Name).Inc()
			errs = append(errs, fmt.Errorf("rule %s: %w", r.Name, err))
		}
	}
	m.metrics.lastEvaluation.Set(float64(at.UnixNano()) / 1e9)
	return errors.Join(errs...)
}

// env is the daemon's evaluation environment at time at: the rolling
// tracker's windows and the store's cells, each fixed range read once.
func (m *Manager) env(at time.Time, models []store.ModelInfo) Env {
	src := newCachedCounts(liveSource{view: m.view, watermark: m.watermark, store: m.store})
	return Env{Source: src, Models: models, At: at, Confidence: m.confidence, Since: m.started}
}

// liveSource reads the current windows from the tracker and fixed ranges
// from the store.
type liveSource struct {
	view      ViewFunc
	watermark func(model string) (time.Time, bool)
	store     Store
}

func (s liveSource) View(model, window string) (windows.View, bool) { return s.view(model, window) }

func (s liveSource) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	return s.store.Counts(ctx, q)
}

func (s liveSource) Watermark(model string) (time.Time, bool) {
	if s.watermark == nil {
		return time.Time{}, false
	}
	return s.watermark(model)
}

// apply steps each instance of r with its finding. Instances of r on a
// model that was read but that got no finding (a class or pair the rule no
// longer covers) count as clear; those on a model that could not be read
// keep their state. A state is changed in memory, and notified, only after
// the store kept it.
func (m *Manager) apply(ctx context.Context, r *Compiled, at time.Time, fs []Finding, read map[string]bool) error {
	seen := make(map[string]bool, len(fs))
	var errs []error
	for _, f := range fs {
		key := instanceKey(r.Name, f.Model, f.Class, f.Predicted)
		seen[key] = true
		errs = append(errs, m.applyOne(ctx, r, key, f, at))
	}
	m.mu.RLock()
	var gone []*instance
	for key, in := range m.instances {
		if in.Rule == r.Name && !seen[key] && read[in.Model] {
			gone = append(gone, in)
		}
	}
	m.mu.RUnlock()
	for _, in := range gone {
		f := Finding{Model: in.Model, Class: in.Class, Predicted: in.Predicted,
			Result: Result{Outcome: OutcomeClear, Reason: "no longer covered by the rule"}}
		errs = append(errs, m.applyOne(ctx, r, in.Key, f, at))
	}
	return errors.Join(errs...)
}

func (m *Manager) applyOne(ctx context.Context, r *Compiled, key string, f Finding, at time.Time) error {
	m.mu.RLock()
	old := m.instances[key]
	m.mu.RUnlock()
	var in *instance
	if old != nil {
		in = old.clone()
	} else {
		in = &instance{Alert: Alert{Key: key, State: StateInactive}}
	}
	in.Rule, in.Kind, in.Model, in.Class, in.Predicted = r.Name, r.Kind, f.Model, f.Class, f.Predicted
	in.Window, in.Severity, in.Metric = r.Window, r.Severity, r.Metric
	in.Labels = r.labels(f.Model, f.Class, f.Predicted)
	in.GeneratorURL = generatorURL(m.generatorURL, f.Model)
	changed := in.step(f.Result, at, r.FireAfter, r.ResolveAfter)
	if old == nil && in.State == StateInactive {
		return nil // nothing happened to an alert nobody has seen
	}
	r.annotate(&in.Alert)
	if err := m.save(ctx, in, changed); err != nil {
		return err
	}
	m.mu.Lock()
	if m.settled(in) {
		delete(m.instances, key)
	} else {
		m.instances[key] = in
	}
	m.mu.Unlock()
	if changed {
		m.log.Info("alert state changed", "key", key, "state", in.State, "at", at)
		if in.State == StateFiring || in.State == StateResolved {
			m.delivery.notify(in.notice())
		}
	}
	return nil
}

// save writes an instance to the store, appending it to the history when
// its state changed.
func (m *Manager) save(ctx context.Context, in *instance, history bool) error {
	rec, err := in.record()
	if err != nil {
		return err
	}
	if err := m.store.SaveAlert(ctx, rec, history); err != nil {
		return fmt.Errorf("save alert state: %w", err)
	}
	return nil
}

// delivered records that notifier n was told of alerts (or gave up on
// them), so that a restart does not tell it again. Only the lock holder
// writes: a replica that lost the lock leaves the record to the new
// holder, which at worst tells the notifier twice.
func (m *Manager) delivered(ctx context.Context, n string, alerts []Alert) {
	m.evalMu.Lock()
	defer m.evalMu.Unlock()
	if !m.leader.Held() {
		return
	}
	for _, a := range alerts {
		m.mu.RLock()
		old := m.instances[a.Key]
		m.mu.RUnlock()
		if old == nil || !old.StartsAt.Equal(a.StartsAt) {
			continue // a newer episode began; its own notice is queued
		}
		in := old.clone()
		if in.Notified == nil {
			in.Notified = make(map[string]notice)
		}
		in.Notified[n] = notice{a.State, a.StartsAt}
		if err := m.save(ctx, in, false); err != nil {
			m.log.Error("record notification", "notifier", n, "key", a.Key, "err", err)
			continue
		}
		m.mu.Lock()
		if m.settled(in) {
			delete(m.instances, a.Key)
		} else {
			m.instances[a.Key] = in
		}
		m.mu.Unlock()
	}
}

// firing returns the firing alerts, for resending; nothing unless this
// replica holds the evaluator lock.
func (m *Manager) firing() []Alert {
	if !m.leader.Held() {
		return nil
	}
	m.mu.RLock()
	defer m.mu.RUnlock()
	var out []Alert
	for _, in := range m.instances {
		if in.State == StateFiring {
			out = append(out, in.Alert)
		}
	}
	slices.SortFunc(out, func(a, b Alert) int { return cmp.Compare(a.Key, b.Key) })
	return out
}

// cronLogger adapts slog to cron's logger. cron's routine messages go to
// debug; its "skip" (a run skipped because the previous one was still
// going) is a warning, counted as missed by the next run.
type cronLogger struct{ log *slog.Logger }

func (l cronLogger) Info(msg string, kv ...any) {
	if msg == "skip" {
		l.log.Warn("alert evaluation skipped: the previous one is still running")
		return
	}
	l.log.Debug("cron "+msg, kv...)
}

func (l cronLogger) Error(err error, msg string, kv ...any) {
	l.log.Error("cron "+msg, append(kv, "err", err)...)
}
