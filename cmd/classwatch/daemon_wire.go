package main

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
)

// start opens the store (waiting for it up to store_wait), applies
// migrations and wires the tracker, collector, read API, alerts and
// metrics, in dependency order; then the gate lets requests through.
func (d *daemon) start(ctx context.Context) (err error) {
	defer func() {
		if err != nil {
			err = errors.Join(err, d.stop(ctx))
		}
	}()
	st, err := openStore(ctx, d.cfg)
	if err != nil {
		return err
	}
	d.store = watchedStore{Store: st, health: d.health}
	d.onStop(stopStore, func(context.Context) error { return st.Close() })
	if err := d.prepareStore(ctx, d.gate.setStarting); err != nil {
		return err
	}
	d.warnSeriesBudget()
	d.gate.setStarting("loading the windows")
	reg := prometheus.NewRegistry()
	reg.MustRegister(
		collectors.NewGoCollector(),
		collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
	)
	if err := d.buildIngest(ctx, reg); err != nil {
		return err
	}
	if err := d.buildSources(reg); err != nil {
		return err
	}
	if err := d.buildAlerts(reg); err != nil {
		return err
	}
	d.gate.open(d.routes(reg))
	return nil
}

// warnSeriesBudget warns when the configuration lets a /metrics scrape
// pass its series budget, so that the left-out series are no surprise.
func (d *daemon) warnSeriesBudget() {
	limit := d.cfg.trackerOptions().MaxSeries
	if err := windows.CheckScrapeBudget(d.cfg.scrapeShapes(), limit); err != nil {
		d.log.Warn("metrics series budget", "max_series", d.cfg.MaxSeries, "err", err)
	}
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
	copts.Store = d.tracker.Track(d.store) // committed changes reach the windows
	copts.Registerer = reg
	copts.Logger = d.log
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
		GeneratorURL: cmp.Or(d.cfg.ExternalURL, d.baseURL()),
	})
	if err != nil {
		return fmt.Errorf("build alerts: %w", err)
	}
	return nil
}

// routes builds the mux of the ingest, read, alert and metrics endpoints.
func (d *daemon) routes(reg *prometheus.Registry) *http.ServeMux {
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
	return mux
}
