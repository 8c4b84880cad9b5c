package main

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/collector/natsjs"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// shutdownTimeout bounds the whole teardown: in-flight batches, the last
// alert evaluation and notifier queues, then the store.
const shutdownTimeout = 20 * time.Second

// maintenanceLock is the store lock that picks the one replica running the
// join's maintenance jobs (they are not safe to run twice at once).
const maintenanceLock = "maintenance"

// daemon is a wired classwatch server. New builds it without serving;
// serve runs until its context ends, then tears down in reverse order.
type daemon struct {
	cfg       config
	log       *slog.Logger
	store     store.Store
	tracker   *windows.Tracker
	collector *collector.Collector
	alerts    *alerts.Manager
	server    *http.Server
	listener  net.Listener
	// sources are the stream sources (sources.go).
	sources []*natsjs.Source

	// stops are teardown steps, run last-registered first.
	stops []stopStep
}

type stopStep struct {
	name string
	fn   func(ctx context.Context) error
}

// onStop registers a teardown step right after the thing it tears down
// exists, so a failure half-way through newDaemon still undoes the rest.
func (d *daemon) onStop(name string, fn func(ctx context.Context) error) {
	d.stops = append(d.stops, stopStep{name, fn})
}

// stop runs the teardown steps in reverse, bounded by shutdownTimeout, and
// joins their errors. Cleanup must happen even when ctx was cancelled.
func (d *daemon) stop(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), shutdownTimeout)
	defer cancel()
	var errs []error
	for i := len(d.stops) - 1; i >= 0; i-- {
		s := d.stops[i]
		if err := s.fn(ctx); err != nil {
			errs = append(errs, fmt.Errorf("stop %s: %w", s.name, err))
		}
	}
	d.stops = nil
	return errors.Join(errs...)
}

// openStore opens the configured backend: PostgreSQL when a URL is set,
// otherwise the SQLite file under data_dir (created if missing).
func openStore(ctx context.Context, cfg config) (store.Store, error) {
	if cfg.Database != "" {
		s, err := pgstore.Open(ctx, cfg.Database, pgstore.Options{})
		if err != nil {
			return nil, fmt.Errorf("open postgres store: %w", err)
		}
		return s, nil
	}
	if err := os.MkdirAll(cfg.DataDir, 0o750); err != nil {
		return nil, fmt.Errorf("create data dir: %w", err)
	}
	s, err := sqlitestore.Open(ctx, cfg.sqlitePath(), sqlitestore.Options{})
	if err != nil {
		return nil, fmt.Errorf("open sqlite store: %w", err)
	}
	return s, nil
}

// newDaemon opens the store, applies migrations and wires the tracker,
// collector, read API, alerts and HTTP server, in dependency order. It
// binds the listener so the caller knows the address before serving.
func newDaemon(ctx context.Context, cfg config, log *slog.Logger) (d *daemon, err error) {
	d = &daemon{cfg: cfg, log: log}
	defer func() {
		if err != nil {
			err = errors.Join(err, d.stop(ctx))
		}
	}()
	if err := d.openStore(ctx); err != nil {
		return d, err
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(
		collectors.NewGoCollector(),
		collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
	)
	if err := d.buildIngest(ctx, reg); err != nil {
		return d, err
	}
	if err := d.buildSources(reg); err != nil {
		return d, err
	}
	d.listener, err = net.Listen("tcp", cfg.Listen)
	if err != nil {
		return d, fmt.Errorf("listen: %w", err)
	}
	d.onStop("listener", func(context.Context) error { return ignoreClosed(d.listener.Close()) })
	if err := d.buildAlerts(reg); err != nil {
		return d, err
	}
	d.buildServer(reg)
	return d, nil
}

// openStore opens the configured store and brings its schema up to date.
func (d *daemon) openStore(ctx context.Context) error {
	st, err := openStore(ctx, d.cfg)
	if err != nil {
		return err
	}
	d.store = st
	d.onStop("store", func(context.Context) error { return d.store.Close() })
	if err := d.store.Migrate(ctx); err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	return nil
}

// buildIngest wires the windows tracker and the collector that feeds it,
// registers the configured models and loads the windows from the store.
func (d *daemon) buildIngest(ctx context.Context, reg prometheus.Registerer) error {
	topts := d.cfg.trackerOptions()
	topts.Store = d.store
	var err error
	d.tracker, err = windows.NewTracker(topts)
	if err != nil {
		return fmt.Errorf("build windows: %w", err)
	}
	copts := d.cfg.collectorOptions()
	copts.Store = d.store
	copts.Registerer = reg
	copts.Logger = d.log
	copts.CommitFunc = d.tracker.Commit
	copts.RegisterFunc = d.tracker.SetClasses
	d.collector, err = collector.New(copts)
	if err != nil {
		return fmt.Errorf("build collector: %w", err)
	}
	if err := d.collector.Prepare(ctx); err != nil {
		return fmt.Errorf("register models: %w", err)
	}
	if err := d.tracker.Load(ctx); err != nil {
		return fmt.Errorf("load windows: %w", err)
	}
	return nil
}

// buildAlerts wires the alert manager over the tracker's windows.
func (d *daemon) buildAlerts(reg prometheus.Registerer) error {
	var err error
	d.alerts, err = alerts.New(alerts.Options{
		Store:        d.store,
		View:         d.tracker.View,
		Watermark:    d.tracker.Watermark,
		Rules:        d.cfg.rules,
		Notifiers:    d.cfg.notifiers,
		Windows:      d.cfg.allWindows(),
		Confidence:   d.cfg.Confidence,
		Registerer:   reg,
		Logger:       d.log,
		GeneratorURL: cmp.Or(d.cfg.ExternalURL, "http://"+d.addr()),
	})
	if err != nil {
		return fmt.Errorf("build alerts: %w", err)
	}
	return nil
}

// buildServer routes the ingest, read, alert and metrics endpoints.
func (d *daemon) buildServer(reg *prometheus.Registry) {
	mux := http.NewServeMux()
	d.collector.Register(mux)
	api.New(api.Options{Store: d.store, Tracker: d.tracker, Confidence: d.cfg.Confidence, Logger: d.log, Ready: d.sourceChecks()}).Register(mux)
	d.alerts.Register(mux)
	// The window families (~52,000 series for 50 models × 12 classes × 4
	// windows) bypass the registry's per-series checks; MergeGatherers
	// reports a family name that both define.
	metrics := windows.MergeGatherers(reg, windows.NewGatherer(d.tracker, d.cfg.Confidence))
	mux.Handle("GET /metrics", api.MetricsHandler(metrics, promhttp.HandlerOpts{
		ErrorHandling:     promhttp.ContinueOnError,
		ErrorLog:          slog.NewLogLogger(d.log.Handler(), slog.LevelError),
		EnableOpenMetrics: true,
	}))
	d.server = &http.Server{
		Handler:           mux,
		ReadHeaderTimeout: 10 * time.Second,
		// An ingest slot is taken before the body is read, so a slow sender
		// must not hold one for long.
		ReadTimeout: time.Minute,
		IdleTimeout: 2 * time.Minute,
		ErrorLog:    slog.NewLogLogger(d.log.Handler(), slog.LevelWarn),
	}
}

// ignoreClosed drops the error of closing a listener the server already
// closed.
func ignoreClosed(err error) error {
	if errors.Is(err, net.ErrClosed) {
		return nil
	}
	return err
}

// addr is the address the daemon listens on (useful with port 0).
func (d *daemon) addr() string { return d.listener.Addr().String() }

// serve runs the HTTP server and the background loops until ctx ends, then
// shuts down: the server first (in-flight batches finish and commit), then
// alerts, then the store.
func (d *daemon) serve(ctx context.Context) error {
	loops, cancelLoops := context.WithCancel(ctx)
	done := make(chan struct{}, 2)
	go func() { d.refreshLoop(loops); done <- struct{}{} }()
	go func() { d.maintainLoop(loops); done <- struct{}{} }()
	d.onStop("background loops", func(ctx context.Context) error {
		cancelLoops()
		for range 2 {
			select {
			case <-done:
			case <-ctx.Done():
				return ctx.Err()
			}
		}
		return nil
	})

	if err := d.alerts.Start(ctx); err != nil {
		return errors.Join(fmt.Errorf("start alerts: %w", err), d.stop(ctx))
	}
	d.onStop("alerts", d.alerts.Stop)

	d.startSources(ctx)
	serveErr := make(chan error, 1)
	go func() { serveErr <- d.server.Serve(d.listener) }()
	d.onStop("http server", d.server.Shutdown)
	d.log.Info("classwatch serving", "addr", d.addr(), "config", d.cfg)

	var err error
	select {
	case <-ctx.Done():
	case err = <-serveErr:
		if errors.Is(err, http.ErrServerClosed) {
			err = nil
		}
	}
	d.log.Info("classwatch shutting down")
	return errors.Join(err, d.stop(ctx))
}

// refreshLoop re-reads the windows from the store every refresh interval,
// so commits by other replicas sharing the database show up.
func (d *daemon) refreshLoop(ctx context.Context) {
	every := time.Duration(d.cfg.Refresh)
	if every <= 0 {
		return
	}
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			if err := d.tracker.Refresh(ctx); err != nil && !errors.Is(err, context.Canceled) {
				d.log.Warn("refresh windows", "err", err)
			}
		}
	}
}

// maintainLoop runs the join's jobs (implied labels, early-label expiry,
// retention) every maintenance interval on the one replica that holds the
// maintenance lock. Under the event clock, "now" is the latest prediction
// time seen, so a backfill of old traffic does not time every label out.
func (d *daemon) maintainLoop(ctx context.Context) {
	every := time.Duration(d.cfg.MaintenanceInterval)
	if every <= 0 {
		return
	}
	var lease store.Lease
	defer func() {
		if lease != nil {
			_ = lease.Release(context.WithoutCancel(ctx))
		}
	}()
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		if lease != nil && lease.Alive(ctx) != nil {
			_ = lease.Release(ctx)
			lease = nil
		}
		if lease == nil {
			l, err := d.store.TryLead(ctx, maintenanceLock)
			if err != nil {
				d.log.Warn("take maintenance lock", "err", err)
				continue
			}
			if l == nil {
				continue // another replica runs the jobs
			}
			lease = l
		}
		if err := d.collector.Maintain(ctx, d.jobTime()); err != nil && !errors.Is(err, context.Canceled) {
			d.log.Warn("maintenance", "err", err)
		}
	}
}

// jobTime is the "now" of the maintenance jobs: the wall clock, or under
// the event clock the latest watermark of any model (the wall clock before
// the first prediction).
func (d *daemon) jobTime() time.Time {
	if d.cfg.Clock == "wall" {
		return time.Now()
	}
	var latest time.Time
	for _, m := range d.tracker.Models() {
		if w, ok := d.tracker.Watermark(m); ok && w.After(latest) {
			latest = w
		}
	}
	if latest.IsZero() {
		return time.Now()
	}
	return latest
}
