// Package loadkit holds what the load tools cmd/cwload and cmd/cwstream
// share: the process entry point, the flags both take, and building and
// running the classwatch daemon as a child process.
package loadkit

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

// Main runs a tool's run function with a context cancelled on SIGINT or
// SIGTERM and exits: status 2 for -h, 1 (with the error on stderr,
// prefixed by name) for a failure, 0 otherwise.
func Main(name string, run func(ctx context.Context, args []string, stdout, stderr io.Writer) error) {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	switch {
	case errors.Is(err, flag.ErrHelp):
		os.Exit(2)
	case err != nil:
		fmt.Fprintln(os.Stderr, name+":", err)
		os.Exit(1)
	}
}

// DefaultDatabaseURL is the local server the tools use unless told.
const DefaultDatabaseURL = "postgres://postgres@127.0.0.1:5432/postgres?sslmode=disable"

// Common are the options both tools take; a tool sets the defaults before
// Register.
type Common struct {
	// DatabaseURL names the server the throwaway databases are made on.
	DatabaseURL string
	// Binary is the daemon to run; empty builds it.
	Binary string
	// N is how many predictions are sent.
	N int
	// LabelFraction is the share of the predictions that get a label.
	LabelFraction float64
	// Batch is the lines per batch (HTTP body, message or store call).
	Batch int
	// Clients is how many batches are in flight at once.
	Clients int
	// Models is how many models (loading docks) the events are spread over.
	Models int
	// Seed seeds the event generator.
	Seed uint64
	// Keep keeps the databases and the temporary directory after the run.
	Keep bool
}

// Register adds the common flags to fs, their defaults the values in c;
// tool names the databases' prefix in the help text.
func (c *Common) Register(fs *flag.FlagSet, tool string) {
	fs.StringVar(&c.DatabaseURL, "database-url", c.DatabaseURL, "PostgreSQL `URL` on which "+tool+"_* databases are created and dropped")
	fs.StringVar(&c.Binary, "binary", c.Binary, "classwatch `binary` to run; empty builds ./cmd/classwatch into a temporary directory")
	fs.IntVar(&c.N, "n", c.N, "predictions to send")
	fs.Float64Var(&c.LabelFraction, "label-fraction", c.LabelFraction, "fraction of the predictions that get a label (0 to 1)")
	fs.IntVar(&c.Batch, "batch", c.Batch, "lines per batch (HTTP body, message or store call)")
	fs.IntVar(&c.Clients, "clients", c.Clients, "concurrent clients")
	fs.IntVar(&c.Models, "models", c.Models, "models (loading docks) the events are spread over")
	fs.Uint64Var(&c.Seed, "seed", c.Seed, "seed of the event generator")
	fs.BoolVar(&c.Keep, "keep", c.Keep, "keep the databases and the temporary directory (daemon logs) after the run")
}
