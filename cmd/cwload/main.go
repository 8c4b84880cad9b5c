// Command cwload is classwatch's load harness. In one run it measures how
// fast a real classwatch daemon, backed by PostgreSQL on the same host,
// takes predictions and their labels over HTTP, and compares that with the
// PostgreSQL store's own ingest rate for the same events:
//
//  1. It creates fresh databases (cwload_<random>) on the server named by
//     --database-url and drops them at the end.
//  2. It builds the daemon (or takes --binary), writes a config and starts
//     "classwatch serve" as a child process on a free loopback port.
//  3. It pushes N predictions, then their labels, as NDJSON batches from
//     --clients concurrent clients, and pushes the very same events, in the
//     same batches and with the same concurrency, straight into a
//     pgstore.Store opened on a second database: the store's own rate.
//     Each store phase runs just before its HTTP phase, so that the two
//     rates of a ratio are measured under the same load on the machine.
//  4. It checks that the daemon's counts and window matrices match the
//     events sent, samples the daemon's resident memory, and reports
//     events/s, batch latency percentiles, CPU use and the ratios.
//  5. It times GET /metrics on a second daemon configured with
//     --scrape-models models × --scrape-classes classes × 4 windows.
//
// The traffic is the parcel classifiers of a fictional warehouse, one model
// per loading dock, generated from --seed so every phase sees the same
// events. Everything runs on loopback addresses; a non-local database is
// refused.
//
// Usage:
//
//	go run ./cmd/cwload [-n 1000000] [--clients 4] [--batch 5000] [--database-url URL]
//
// -n 20000 is a quick run of a few seconds. Progress goes to stderr, the
// report to stdout.
package main

import (
	"context"
	"flag"
	"fmt"
	"io"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
)

func main() { loadkit.Main("cwload", run) }

// run parses the flags, runs the harness and prints its report to stdout.
// Progress lines go to stderr.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	opts, err := parseFlags(args, stderr)
	if err != nil {
		return err
	}
	res, err := runHarness(ctx, opts, stderr)
	if res != nil {
		res.print(stdout)
	}
	return err
}

// parseFlags maps the command line onto options.
func parseFlags(args []string, stderr io.Writer) (options, error) {
	o := defaultOptions()
	fs := flag.NewFlagSet("cwload", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(fs.Output(), "usage: cwload [flags]   (see the package doc: go doc ./cmd/cwload)")
		fs.PrintDefaults()
	}
	o.Register(fs, "cwload")
	fs.DurationVar(&o.span, "span", o.span, "prediction times are spread over this long, ending a few minutes ago")
	fs.BoolVar(&o.push, "push", o.push, "run the ingest benchmark")
	fs.BoolVar(&o.scrape, "scrape", o.scrape, "run the /metrics scrape benchmark")
	fs.IntVar(&o.scrapeModels, "scrape-models", o.scrapeModels, "models of the scrape benchmark")
	fs.IntVar(&o.scrapeClasses, "scrape-classes", o.scrapeClasses, "classes per model of the scrape benchmark (at most 12)")
	fs.IntVar(&o.scrapeEvents, "scrape-events", o.scrapeEvents, "predictions (all labeled) per model of the scrape benchmark")
	fs.IntVar(&o.scrapes, "scrapes", o.scrapes, "timed scrapes per variant")
	if err := fs.Parse(args); err != nil {
		return o, err
	}
	if fs.NArg() > 0 {
		return o, fmt.Errorf("unexpected argument %q", fs.Arg(0))
	}
	return o, o.validate()
}
