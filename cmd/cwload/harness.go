package main

import (
	"context"
	"debug/buildinfo"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"time"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
	"github.com/classwatch/classwatch/windows"
)

// options configure a run.
type options struct {
	loadkit.Common
	span time.Duration

	push          bool
	scrape        bool
	scrapeModels  int
	scrapeClasses int
	scrapeEvents  int
	scrapes       int
}

func defaultOptions() options {
	return options{
		Common: loadkit.Common{
			DatabaseURL: loadkit.DefaultDatabaseURL, N: 1_000_000, LabelFraction: 1,
			Clients: 4, Batch: 5000, Models: 4, Seed: 1,
		},
		span:          12 * time.Hour,
		push:          true,
		scrape:        true,
		scrapeModels:  50,
		scrapeClasses: 12,
		scrapeEvents:  2400,
		scrapes:       20,
	}
}

func (o options) validate() error {
	var errs []error
	bad := func(format string, args ...any) { errs = append(errs, fmt.Errorf(format, args...)) }
	if o.Models < 1 || o.Models > 99 {
		bad("--models must be 1 to 99")
	}
	if o.N < 1 || (o.Models > 0 && o.N%o.Models != 0) {
		bad("-n must be a positive multiple of --models (%d)", o.Models)
	}
	if !(o.LabelFraction >= 0 && o.LabelFraction <= 1) {
		bad("--label-fraction must be between 0 and 1")
	}
	if o.Clients < 1 || o.Clients > 64 {
		bad("--clients must be 1 to 64")
	}
	if o.Batch < 1 {
		bad("--batch must be positive")
	}
	if o.span < 10*time.Minute || o.span > 30*24*time.Hour {
		bad("--span must be 10m to 720h")
	}
	if o.scrapeModels < 1 || o.scrapeModels > 99 {
		bad("--scrape-models must be 1 to 99")
	}
	if o.scrapeClasses < 2 || o.scrapeClasses > len(parcelClasses()) {
		bad("--scrape-classes must be 2 to %d", len(parcelClasses()))
	}
	if o.scrapeEvents < 1 || o.scrapes < 1 {
		bad("--scrape-events and --scrapes must be positive")
	}
	if !o.push && !o.scrape {
		bad("--push=false and --scrape=false leave nothing to run")
	}
	return errors.Join(errs...)
}

// results are a run's figures.
type results struct {
	Started time.Time
	Took    time.Duration
	Options options
	// Host describes the machine and PostgreSQL.
	CPUs     int
	Postgres string
	// Daemon describes the daemon binary: Go version and VCS state.
	Daemon string
	// BusyBefore is the host's CPU use (in cores) over a few seconds
	// before the run: other work on the machine skews every figure.
	BusyBefore float64
	Push       *pushResults
	Scrape     *scrapeResults
}

// harness holds a run's shared resources.
type harness struct {
	opts     options
	progress io.Writer
	srv      *server
	dir      string // temporary directory: binary, configs, daemon logs
	binary   string
}

// runHarness runs the benchmarks opts asks for and returns their figures;
// on failure it returns what was measured so far with the error. Databases,
// the temporary directory and daemons are cleaned up unless opts.Keep.
func runHarness(ctx context.Context, opts options, progress io.Writer) (res *results, err error) {
	if err := opts.validate(); err != nil {
		return nil, err
	}
	srv, err := newServer(opts.DatabaseURL)
	if err != nil {
		return nil, err
	}
	res = &results{Started: time.Now(), Options: opts, CPUs: runtime.NumCPU()}
	defer func() { res.Took = time.Since(res.Started) }()
	if res.Postgres, err = srv.describe(ctx); err != nil {
		return res, err
	}
	if res.BusyBefore, err = hostBusyOver(ctx, busyProbe); err != nil {
		return res, err
	}
	dir, err := os.MkdirTemp("", "cwload-")
	if err != nil {
		return res, fmt.Errorf("create temporary directory: %w", err)
	}
	h := &harness{opts: opts, progress: progress, srv: srv, dir: dir, binary: opts.Binary}
	defer func() {
		if opts.Keep {
			fmt.Fprintf(progress, "kept: databases %s, directory %s\n", strings.Join(srv.created, " "), dir)
			return
		}
		err = errors.Join(err, srv.dropAll(ctx), os.RemoveAll(dir))
	}()

	if h.binary == "" {
		fmt.Fprintln(progress, "building the daemon")
		if h.binary, err = loadkit.BuildDaemon(ctx, dir); err != nil {
			return res, err
		}
	}
	res.Daemon = describeBinary(h.binary)
	if opts.push {
		res.Push, err = h.runPush(ctx)
		if err != nil {
			return res, err
		}
	}
	if opts.scrape {
		res.Scrape, err = h.runScrape(ctx)
		if err != nil {
			return res, err
		}
	}
	return res, nil
}

// busyProbe is how long the host's CPU use is read before the run.
const busyProbe = 3 * time.Second

// hostBusyOver returns the host's CPU use, in cores, over d.
func hostBusyOver(ctx context.Context, d time.Duration) (float64, error) {
	b0, err := hostBusy()
	if err != nil {
		return 0, err
	}
	start := time.Now()
	select {
	case <-ctx.Done():
		return 0, ctx.Err()
	case <-time.After(d):
	}
	b1, err := hostBusy()
	if err != nil {
		return 0, err
	}
	return (b1 - b0).Seconds() / time.Since(start).Seconds(), nil
}

// describeBinary names a binary's Go version and the VCS revision it was
// built from, when recorded.
func describeBinary(path string) string {
	info, err := buildinfo.ReadFile(path)
	if err != nil {
		return path + " (no build info: " + err.Error() + ")"
	}
	desc := path + ", " + info.GoVersion
	for _, s := range info.Settings {
		switch s.Key {
		case "vcs.revision":
			desc += ", revision " + s.Value
		case "vcs.modified":
			if s.Value == "true" {
				desc += " with local changes"
			}
		}
	}
	return desc
}

// writeConfig writes a daemon config for the scenario's models and
// windows. The listen address and database come as flags. Ingest limits
// let every client's batch run at once and take bodies far larger than a
// batch; event times are not bounded ahead of the receive time.
func (h *harness) writeConfig(name string, sc *scenario, ws []windows.Window) (string, error) {
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %s\nbucket: %s\nwindows:\n", filepath.Join(h.dir, name+"-data"), bucket)
	for _, w := range ws {
		fmt.Fprintf(&b, "  - {name: %s, length: %s, lag: %s}\n", w.Name, w.Length, w.Lag)
	}
	b.WriteString("models:\n")
	for _, m := range sc.models {
		fmt.Fprintf(&b, "  - name: %s\n    classes: [%s]\n", m, strings.Join(sc.classes, ", "))
	}
	fmt.Fprintf(&b, "ingest:\n  max_body_bytes: 256MiB\n  max_in_flight: %d\n  queue_wait: 2m\n  max_future: 0\n", h.opts.Clients)
	path := filepath.Join(h.dir, name+".yaml")
	if err := os.WriteFile(path, []byte(b.String()), 0o600); err != nil {
		return "", fmt.Errorf("write config: %w", err)
	}
	return path, nil
}

// startDaemon creates a database, writes the config and starts a daemon on
// them.
func (h *harness) startDaemon(ctx context.Context, name string, sc *scenario, ws []windows.Window) (*loadkit.Daemon, error) {
	dbURL, err := h.srv.create(ctx)
	if err != nil {
		return nil, err
	}
	cfg, err := h.writeConfig(name, sc, ws)
	if err != nil {
		return nil, err
	}
	fmt.Fprintf(h.progress, "starting the daemon (%s)\n", name)
	// The --database flag wins over CLASSWATCH_DATABASE_URL in the environment.
	return loadkit.StartDaemon(ctx, h.binary, cfg, filepath.Join(h.dir, name+".log"), "--database", dbURL)
}
