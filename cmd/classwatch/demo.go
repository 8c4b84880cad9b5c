package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/url"
	"os"
	"path/filepath"
	"time"

	"github.com/classwatch/classwatch/collector/sim"
)

// runDemo is "classwatch demo": the daemon on the embedded store in a
// temporary directory, fed simulated traffic from a fictional bank over its
// own HTTP endpoints, serving until Ctrl-C.
func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("demo", "demo [--listen ADDR] [--days N] [--speed X] [--seed N]", stderr)
	listen := fs.String("listen", "127.0.0.1:9640", "listen `address` (port 0 picks a free one)")
	days := fs.Int("days", 14, "simulated `days` of history to replay before going on in real time")
	speed := fs.Float64("speed", sim.DefaultSpeed, "simulated seconds per real second")
	seed := fs.Int64("seed", 1, "random `seed` of the simulation")
	keep := fs.Bool("keep", false, "keep the temporary data directory on exit")
	verbose := fs.Bool("verbose", false, "log the daemon's messages")
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	if *days <= 0 || *speed <= 0 {
		return usagef("demo: --days and --speed must be positive")
	}

	dir, err := os.MkdirTemp("", "classwatch-demo-*")
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if !*keep {
		defer os.RemoveAll(dir)
	}
	opts := sim.Options{
		Start: time.Now().UTC().Truncate(time.Hour).Add(-time.Duration(*days) * 24 * time.Hour),
		Speed: *speed,
		Seed:  *seed,
	}
	text, err := sim.Config(*listen, dir, opts)
	if err != nil {
		return fmt.Errorf("demo config: %w", err)
	}
	cfgPath := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(cfgPath, []byte(text), 0o600); err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	cfg, err := loadConfig(configSource{path: cfgPath, secrets: true})
	if err != nil {
		return fmt.Errorf("demo config: %w", err)
	}
	cfg.Database = "" // the demo never touches a configured database
	logOut := io.Discard
	if *verbose {
		logOut = stderr
	}
	d, err := newDaemon(ctx, cfg, newLogger(logOut, false))
	if err != nil {
		return err
	}
	if err := d.start(ctx); err != nil {
		return err
	}
	base := d.baseURL()
	fmt.Fprintf(stdout, `classwatch demo: Plumtwig Mutual (a fictional bank), two models simulated at %.0f× real time.

  overview      %[2]s/
  metrics       %[2]s/metrics
  models        %[2]s/v1/models
  card windows  %[2]s/v1/models/card-screen/windows
  card page     %[2]s/models/card-screen
  audit report  %[2]s/v1/models/card-screen/report?%[5]s
  alerts        %[2]s/v1/alerts

Data directory: %[3]s (config: %[4]s)
Fraud recall on card-screen falls about 25s in; the 3d window shows it within a minute.
Press Ctrl-C to stop.

`, *speed, base, dir, cfgPath, demoReportQuery(opts.Start))

	simDone := make(chan struct{})
	go func() {
		defer close(simDone)
		var last time.Time
		progress := func(s sim.Stats) {
			if time.Since(last) < 5*time.Second {
				return
			}
			last = time.Now()
			fmt.Fprintf(stdout, "simulated %s: %d predictions and %d labels sent (%d accepted, %d duplicates, %d rejected)\n",
				s.SimTime.Format("2006-01-02 15:04"), s.Predictions, s.Labels, s.Accepted, s.Duplicates, s.Rejected)
		}
		err := sim.Run(ctx, opts, base, nil, progress)
		switch {
		case err != nil && !errors.Is(err, context.Canceled):
			fmt.Fprintf(stdout, "simulation stopped: %v (still serving; Ctrl-C to stop)\n", err)
		case ctx.Err() == nil:
			fmt.Fprintln(stdout, "simulation caught up with the present; still serving, Ctrl-C to stop")
		}
	}()
	err = d.serve(ctx)
	<-simDone
	return err
}

// demoReportQuery is the query of the demo's printed audit report: the
// first simulated day (README "Pages and the audit report").
func demoReportQuery(start time.Time) string {
	return url.Values{"from": {start.Format(time.RFC3339)}, "to": {start.Add(24 * time.Hour).Format(time.RFC3339)}}.Encode()
}
