package main

import (
	"context"
	"errors"
	"fmt"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/collector/natsjs"
)

// buildSources connects the configured stream sources; they consume only
// once serve starts them. A server that cannot be reached does not stop
// the daemon: the source retries and /readyz reports it meanwhile.
func (d *daemon) buildSources(reg prometheus.Registerer) error {
	if len(d.cfg.Sources) == 0 {
		return nil
	}
	m, err := natsjs.NewMetrics(reg)
	if err != nil {
		return err
	}
	d.onStop(stopStreams, d.stopSources)
	for _, sc := range d.cfg.Sources {
		src, err := natsjs.New(natsjs.Options{
			Config:       sc.natsConfig(),
			Submitter:    d.collector,
			MaxBodyBytes: int64(d.cfg.Ingest.MaxBodyBytes),
			Metrics:      m,
			Logger:       d.log,
		})
		if err != nil {
			return fmt.Errorf("build %v: %w", sc, err)
		}
		d.sources = append(d.sources, src)
	}
	return nil
}

// startSources starts consuming every stream source.
func (d *daemon) startSources(ctx context.Context) {
	for _, s := range d.sources {
		s.Start(ctx)
	}
}

// stopSources stops fetching, lets the messages in hand commit and be
// acknowledged, and closes the connections; it runs before the store
// closes.
func (d *daemon) stopSources(ctx context.Context) error {
	var errs []error
	for _, s := range d.sources {
		errs = append(errs, s.Stop(ctx))
	}
	return errors.Join(errs...)
}

// sourceChecks are the sources' readiness checks for /readyz.
func (d *daemon) sourceChecks() []func(context.Context) error {
	var out []func(context.Context) error
	for _, s := range d.sources {
		out = append(out, s.Ready)
	}
	return out
}
