// Command cwstream measures JetStream ingest against HTTP ingest in one
// run, into the same classwatch daemon and the same PostgreSQL database
// (README.md "Stream source (NATS JetStream)"):
//
//  1. It creates a fresh database (cwstream_<random>) on --database-url and
//     starts a private nats-server with JetStream on a free loopback port
//     (or uses --nats-url), builds the daemon (or takes --binary) and starts
//     "classwatch serve" with a sources block.
//  2. It sends N predictions and their labels twice, in the same batches
//     (one batch = one HTTP body = one message): over HTTP from --clients
//     concurrent clients to models h-dock-*, and as JetStream messages from
//     --clients publishers to models s-dock-*. The phases run in the order
//     HTTP predictions, stream predictions, stream labels, HTTP labels, so
//     that neither path always meets the smaller tables. A stream phase
//     lasts from its first publish until the shared consumer has nothing
//     pending or unacknowledged.
//  3. It checks that both model sets end with the same counts, and reports
//     lines/s per phase and the stream/HTTP ratios.
//  4. Overload: it publishes predictions (models o-dock-*) at twice the
//     stream rate just measured for --overload, sampling the consumer's lag
//     every second, then reports how the lag grew and how long it took to
//     drain.
//
// The traffic is a fictional warehouse's parcel classifiers, generated
// from --seed. Usage:
//
//	go run ./cmd/cwstream [-n 1000000] [--label-fraction 0.9] [--batch 2000] [--clients 4]
//
// -n 20000 is a quick run. Progress goes to stderr, the report to stdout.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
	"time"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	switch {
	case errors.Is(err, flag.ErrHelp):
		os.Exit(2)
	case err != nil:
		fmt.Fprintln(os.Stderr, "cwstream:", err)
		os.Exit(1)
	}
}

// options configure a run.
type options struct {
	databaseURL   string
	natsURL       string
	binary        string
	n             int
	labelFraction float64
	batch         int
	clients       int
	models        int
	seed          uint64
	overload      time.Duration
	keep          bool
}

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	o := options{
		databaseURL: "postgres://postgres@127.0.0.1:5432/postgres?sslmode=disable",
		n:           1_000_000, labelFraction: 0.9, batch: 2000, clients: 4, models: 4, seed: 1,
		overload: 20 * time.Second,
	}
	fs := flag.NewFlagSet("cwstream", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.StringVar(&o.databaseURL, "database-url", o.databaseURL, "PostgreSQL `URL` on which a cwstream_* database is created and dropped")
	fs.StringVar(&o.natsURL, "nats-url", "", "NATS `URL` with JetStream; empty starts a private nats-server")
	fs.StringVar(&o.binary, "binary", "", "classwatch `binary`; empty builds ./cmd/classwatch")
	fs.IntVar(&o.n, "n", o.n, "predictions per path")
	fs.Float64Var(&o.labelFraction, "label-fraction", o.labelFraction, "fraction of the predictions that get a label")
	fs.IntVar(&o.batch, "batch", o.batch, "lines per HTTP body and per message")
	fs.IntVar(&o.clients, "clients", o.clients, "HTTP clients, publishers, and the daemon's max_in_flight and workers")
	fs.IntVar(&o.models, "models", o.models, "models per path")
	fs.Uint64Var(&o.seed, "seed", o.seed, "seed of the event generator")
	fs.DurationVar(&o.overload, "overload", o.overload, "how long to publish at twice the measured stream rate; 0 skips it")
	fs.BoolVar(&o.keep, "keep", false, "keep the database and the temporary directory")
	if err := fs.Parse(args); err != nil {
		return err
	}
	switch {
	case o.n < o.models || o.n%o.models != 0 || o.models < 1:
		return fmt.Errorf("-n must be a positive multiple of --models")
	case o.batch < 1 || o.clients < 1 || o.labelFraction < 0 || o.labelFraction > 1:
		return fmt.Errorf("--batch and --clients must be positive, --label-fraction in [0, 1]")
	}
	rep, err := runHarness(ctx, o, stderr)
	if rep != nil {
		rep.print(stdout)
	}
	return err
}
