package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"time"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/collector/natsjs"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/lease"
)

// Each teardown step has its own budget, so one slow step (a stalled
// client, an unreachable webhook) cannot use up the next one's time.
const (
	httpDrainBudget = 10 * time.Second
	streamsBudget   = 10 * time.Second
	loopsBudget     = 5 * time.Second
	alertsBudget    = 15 * time.Second
	storeBudget     = 10 * time.Second
)

// maintenanceLock is the store lock that picks the one replica running the
// join's maintenance jobs (they are not safe to run twice at once).
const maintenanceLock = "maintenance"

// daemon is a classwatch server. newDaemon binds the listener and answers
// /healthz and /readyz at once; start wires the rest; serve runs until its
// context ends, then tears down in reverse order.
type daemon struct {
	cfg       config
	log       *slog.Logger
	store     store.Store
	tracker   *windows.Tracker
	collector *collector.Collector
	alerts    *alerts.Manager
	server    *http.Server
	listener  net.Listener
	gate      *gate
	// sources are the stream sources (sources.go).
	sources []*natsjs.Source
	health  *storeHealth
	// certs is nil without TLS; hup delivers SIGHUP (nil: never).
	certs    *certReloader
	hup      <-chan os.Signal
	serveErr chan error

	// stops are the teardown steps of each phase.
	stops [nStopPhases][]func(ctx context.Context) error
}

// stopPhase orders the teardown: the HTTP server drains first (batches in
// flight commit), then the stream sources (messages in hand commit and are
// acknowledged), the background loops, the alerts (queued
// notifications are sent), the store, the listener.
type stopPhase int

const (
	stopHTTP stopPhase = iota
	stopStreams
	stopLoops
	stopAlerts
	stopStore
	stopListener
	nStopPhases
)

// String names the phase in errors.
func (p stopPhase) String() string {
	return [...]string{"http server", "stream sources", "background loops", "alerts", "store", "listener"}[p]
}

// budget is the time the phase gets, whatever the others used.
func (p stopPhase) budget() time.Duration {
	return [...]time.Duration{httpDrainBudget, streamsBudget, loopsBudget, alertsBudget, storeBudget, time.Second}[p]
}

// onStop registers the teardown of a phase as soon as the thing it tears
// down exists, so a failure half-way through start still undoes the rest.
func (d *daemon) onStop(p stopPhase, fn func(ctx context.Context) error) {
	d.stops[p] = append(d.stops[p], fn)
}

// stop runs the registered teardown phase by phase, each within its own
// budget, and joins their errors. Cleanup must happen even when ctx was
// cancelled.
func (d *daemon) stop(ctx context.Context) error {
	base := context.WithoutCancel(ctx)
	var errs []error
	for p := range nStopPhases {
		sctx, cancel := context.WithTimeout(base, p.budget())
		for _, fn := range d.stops[p] {
			if err := fn(sctx); err != nil {
				errs = append(errs, fmt.Errorf("stop %s: %w", p, err))
			}
		}
		cancel()
		d.stops[p] = nil
	}
	return errors.Join(errs...)
}

// newDaemon loads the TLS certificate, binds the listener and serves
// through the gate, which answers /healthz and /readyz (with the reason)
// while start wires everything else.
func newDaemon(ctx context.Context, cfg config, log *slog.Logger) (d *daemon, err error) {
	d = &daemon{cfg: cfg, log: log, health: &storeHealth{now: time.Now}, serveErr: make(chan error, 1)}
	defer func() {
		if err != nil {
			err = errors.Join(err, d.stop(ctx))
		}
	}()
	if cfg.TLS.enabled() {
		if d.certs, err = newCertReloader(cfg.TLS.CertFile, cfg.TLS.KeyFile, log); err != nil {
			return d, err
		}
	}
	d.gate = newGate(d.health, cfg.Read.Tokens, time.Duration(cfg.Ingest.RetryAfter))
	d.listener, err = net.Listen("tcp", cfg.Listen)
	if err != nil {
		return d, fmt.Errorf("listen: %w", err)
	}
	d.onStop(stopListener, func(context.Context) error { return ignoreClosed(d.listener.Close()) })
	d.server = &http.Server{
		Handler:           d.gate,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       time.Minute,
		IdleTimeout:       2 * time.Minute,
		ErrorLog:          slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
	go func() {
		if d.certs != nil {
			d.server.TLSConfig = d.certs.tlsConfig()
			d.serveErr <- d.server.ServeTLS(d.listener, "", "")
			return
		}
		d.serveErr <- d.server.Serve(d.listener)
	}()
	d.onStop(stopHTTP, d.drain)
	d.warnExposure()
	return d, nil
}

// warnExposure logs when the daemon listens beyond loopback with parts of
// it open (README.md "Security and limits").
func (d *daemon) warnExposure() {
	if loopbackOnly(d.cfg.Listen) {
		return
	}
	if len(d.cfg.Read.Tokens) == 0 {
		d.log.Warn("listening beyond loopback with no read token: the read API, pages and /metrics are open to anyone who can reach the port", "listen", d.cfg.Listen)
	}
	if len(d.cfg.Ingest.Tokens) == 0 {
		d.log.Warn("listening beyond loopback with no ingest token: anyone who can reach the port may write predictions and labels", "listen", d.cfg.Listen)
	}
	if !d.cfg.TLS.enabled() {
		d.log.Warn("listening beyond loopback without TLS: tokens and data cross the network in clear text", "listen", d.cfg.Listen)
	}
}

// drain shuts the HTTP server down: request bodies still arriving are cut
// first (their senders get 503 with Retry-After and may resend), so a
// stalled sender cannot hold the drain; then new connections are refused,
// idle ones closed, and requests in flight finish. What is left when the
// budget ends is closed. Neither is a failure of the daemon, so neither
// makes the process exit non-zero.
func (d *daemon) drain(ctx context.Context) error {
	if d.collector != nil {
		d.collector.CutBodies()
	}
	err := d.server.Shutdown(ctx)
	if errors.Is(err, context.DeadlineExceeded) {
		d.log.Warn("shutdown: HTTP drain budget spent; closing the remaining connections", "budget", httpDrainBudget.String())
		return d.server.Close()
	}
	return err
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

// baseURL is how this daemon is reached on its listener.
func (d *daemon) baseURL() string {
	if d.certs != nil {
		return "https://" + d.addr()
	}
	return "http://" + d.addr()
}

// serve runs the background loops and the alerts until ctx ends or the
// server fails, then shuts down: the HTTP server first (in-flight batches
// finish and commit), then the loops, the alerts (queued notifications are
// sent), the store.
func (d *daemon) serve(ctx context.Context) error {
	loops, cancelLoops := context.WithCancel(ctx)
	const nLoops = 3
	done := make(chan struct{}, nLoops)
	go func() { d.refreshLoop(loops); done <- struct{}{} }()
	go func() { d.maintainLoop(loops); done <- struct{}{} }()
	go func() { d.watchCerts(loops); done <- struct{}{} }()
	d.onStop(stopLoops, func(ctx context.Context) error {
		cancelLoops()
		for range nLoops {
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
	d.onStop(stopAlerts, d.alerts.Stop)
	d.startSources(ctx)
	d.log.Info("classwatch serving", "addr", d.addr(), "config", d.cfg)

	var err error
	select {
	case <-ctx.Done():
	case err = <-d.serveErr:
		if errors.Is(err, http.ErrServerClosed) {
			err = nil
		}
	}
	d.log.Info("classwatch shutting down")
	return errors.Join(err, d.stop(ctx))
}

// watchCerts reloads the TLS certificate on SIGHUP and when its files
// change; without TLS it returns at once.
func (d *daemon) watchCerts(ctx context.Context) {
	if d.certs != nil {
		d.certs.watch(ctx, d.hup, certCheckInterval)
	}
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
	leader := lease.New(d.store, maintenanceLock, lease.Options{})
	defer func() { _ = leader.Release(context.WithoutCancel(ctx)) }()
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		held, err := leader.Lead(ctx)
		if err != nil {
			d.log.Warn("take maintenance lock", "err", err)
			continue
		}
		if !held {
			continue // another replica runs the jobs
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
