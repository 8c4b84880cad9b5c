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
	"flag"
	"fmt"
	"io"
	"time"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
)

func main() { loadkit.Main("cwstream", run) }

// options configure a run.
type options struct {
	loadkit.Common
	natsURL  string
	overload time.Duration
}

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	o := options{
		Common: loadkit.Common{
			DatabaseURL: loadkit.DefaultDatabaseURL,
			N:           1_000_000, LabelFraction: 0.9, Batch: 2000, Clients: 4, Models: 4, Seed: 1,
		},
		overload: 20 * time.Second,
	}
	fs := flag.NewFlagSet("cwstream", flag.ContinueOnError)
	fs.SetOutput(stderr)
	o.Register(fs, "cwstream")
	fs.StringVar(&o.natsURL, "nats-url", "", "NATS `URL` with JetStream; empty starts a private nats-server")
	fs.DurationVar(&o.overload, "overload", o.overload, "how long to publish at twice the measured stream rate; 0 skips it")
	if err := fs.Parse(args); err != nil {
		return err
	}
	switch {
	case o.N < o.Models || o.N%o.Models != 0 || o.Models < 1:
		return fmt.Errorf("-n must be a positive multiple of --models")
	case o.Batch < 1 || o.Clients < 1 || o.LabelFraction < 0 || o.LabelFraction > 1:
		return fmt.Errorf("--batch and --clients must be positive, --label-fraction in [0, 1]")
	}
	rep, err := runHarness(ctx, o, stderr)
	if rep != nil {
		rep.print(stdout)
	}
	return err
}
