package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
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
	var o demoOptions
	fs.StringVar(&o.listen, "listen", "127.0.0.1:9640", "listen `address` (port 0 picks a free one)")
	fs.IntVar(&o.days, "days", 14, "simulated `days` of history to replay before going on in real time (at least 11)")
	fs.Float64Var(&o.speed, "speed", sim.DefaultSpeed, "simulated seconds per real second")
	fs.Int64Var(&o.seed, "seed", 1, "random `seed` of the simulation")
	fs.BoolVar(&o.keep, "keep", false, "keep the temporary data directory on exit")
	fs.BoolVar(&o.verbose, "verbose", false, "log the daemon's messages")
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	if o.days < minDemoDays || o.speed <= 0 {
		return usagef("demo: --days must be at least %d (the fraud wave comes on day %d) and --speed positive",
			minDemoDays, int(sim.DefaultDriftAfter.Hours()/24))
	}
	return playDemo(ctx, o, stdout, stderr)
}

// minDemoDays is the shortest replay that shows the fraud wave and, two
// simulated days later, the recall rules.
const minDemoDays = 11

// demoOptions are the demo's flags, and onEvent, which hears of each
// alert's first firing (tests).
type demoOptions struct {
	listen        string
	days          int
	speed         float64
	seed          int64
	keep, verbose bool
	onEvent       func(storyEvent)
}

// playDemo runs the demo with o until ctx ends.
func playDemo(ctx context.Context, o demoOptions, stdout, stderr io.Writer) error {
	dir, err := os.MkdirTemp("", "classwatch-demo-*")
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if !o.keep {
		defer os.RemoveAll(dir)
	}
	opts := sim.Options{
		Start:      time.Now().UTC().Truncate(time.Hour).Add(-time.Duration(o.days) * 24 * time.Hour),
		Speed:      o.speed,
		Seed:       o.seed,
		DriftAfter: sim.DefaultDriftAfter,
	}
	cfgPath, cfg, err := writeDemoConfig(o.listen, dir, opts)
	if err != nil {
		return err
	}
	logOut := io.Discard
	if o.verbose {
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
	drift := opts.Start.Add(opts.DriftAfter)
	fmt.Fprintf(stdout, `classwatch demo: Plumtwig Mutual (a fictional bank), two models simulated at %.0f× real time.

  overview      %[2]s/
  metrics       %[2]s/metrics
  models        %[2]s/v1/models
  card windows  %[2]s/v1/models/card-screen/windows
  card page     %[2]s/models/card-screen
  audit report  %[2]s/v1/models/card-screen/report?%[5]s
  alerts        %[2]s/v1/alerts

Data directory: %[3]s (config: %[4]s)
A wave of a new fraud pattern hits card-screen about %.0[6]fs in (simulated %[7]s). Watch which
rule sees it first: %[8]s (label-free, every %[9]s) or %[10]s (needs chargebacks).
Press Ctrl-C to stop.

`, o.speed, base, dir, cfgPath, demoReportQuery(opts.Start), opts.DriftAfter.Seconds()/o.speed, clock(drift),
		sim.EarlyRule, sim.Schedule(o.speed), sim.RecallRule)

	began := time.Now()
	st := newStory(stdout, began, drift, o.onEvent)
	watchCtx, stopWatch := context.WithCancel(ctx)
	defer stopWatch()
	go st.watch(watchCtx, &http.Client{Timeout: 10 * time.Second}, base, time.Second/2)

	simDone := make(chan struct{})
	go func() {
		defer close(simDone)
		var last time.Time
		progress := func(s sim.Stats) {
			st.progress(s)
			if time.Since(last) < 5*time.Second {
				return
			}
			last = time.Now()
			st.printf("%6.1fs  simulated %s: %d predictions and %d labels sent (%d accepted, %d duplicates, %d rejected)\n",
				time.Since(began).Seconds(), clock(s.SimTime), s.Predictions, s.Labels, s.Accepted, s.Duplicates, s.Rejected)
		}
		err := sim.Run(ctx, opts, base, nil, progress)
		switch {
		case err != nil && !errors.Is(err, context.Canceled):
			st.printf("simulation stopped: %v (still serving; Ctrl-C to stop)\n", err)
		case ctx.Err() == nil:
			st.printf("simulation caught up with the present; still serving, Ctrl-C to stop\n")
		}
	}()
	err = d.serve(ctx)
	<-simDone
	return err
}

// writeDemoConfig writes the simulation's config into dir and loads it,
// with the database cleared: the demo keeps its data in dir.
func writeDemoConfig(listen, dir string, opts sim.Options) (string, config, error) {
	text, err := sim.Config(listen, dir, opts)
	if err != nil {
		return "", config{}, fmt.Errorf("demo config: %w", err)
	}
	cfgPath := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(cfgPath, []byte(text), 0o600); err != nil {
		return "", config{}, fmt.Errorf("demo: %w", err)
	}
	cfg, err := loadConfig(configSource{path: cfgPath, secrets: true})
	if err != nil {
		return "", config{}, fmt.Errorf("demo config: %w", err)
	}
	cfg.Database = "" // the demo never touches a configured database
	return cfgPath, cfg, nil
}

// demoReportQuery is the query of the demo's printed audit report: the
// first simulated day (README "Pages and the audit report").
func demoReportQuery(start time.Time) string {
	return url.Values{"from": {start.Format(time.RFC3339)}, "to": {start.Add(24 * time.Hour).Format(time.RFC3339)}}.Encode()
}
