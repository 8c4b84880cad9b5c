// Command classwatch watches deployed classifiers: it joins logged
// predictions with late ground-truth labels, keeps per-bucket confusion
// matrices, exports rolling-window metrics to Prometheus, raises alerts and
// answers audit questions. Run "classwatch help" for the subcommands.
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
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(exitCode(err, os.Stderr))
}

// usageError marks a command-line mistake: exit status 2.
type usageError struct{ msg string }

func (e usageError) Error() string { return e.msg }

func usagef(format string, args ...any) error { return usageError{fmt.Sprintf(format, args...)} }

// exitCode maps run's error to the process status: 0 ok, 1 failure, 2 usage.
func exitCode(err error, stderr io.Writer) int {
	var ue usageError
	switch {
	case err == nil, errors.Is(err, flag.ErrHelp):
		return 0
	case errors.As(err, &ue):
		fmt.Fprintf(stderr, "classwatch: %v\n", err)
		return 2
	default:
		fmt.Fprintf(stderr, "classwatch: %v\n", err)
		return 1
	}
}

const topUsage = `classwatch watches classifiers in production.

Usage:
  classwatch serve   [--config F] [--listen ADDR] [--database URL]   run the daemon
  classwatch demo                                                   run a simulated deployment
  classwatch migrate [--config F] [--database URL]                  apply schema migrations
  classwatch audit   --model M --from T --to T [--as-of T] [--format table|json|csv]
  classwatch verify  [--config F] [--database URL]                  recompute cells from raw rows
  classwatch ingest  predictions|labels FILE.ndjson                 bulk backfill into the store
  classwatch rules   check F                                        validate alert rules

Run "classwatch COMMAND --help" for a command's flags.
`

// run dispatches to a subcommand. It is main without the process: tests
// call it with their own context, arguments and writers.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, topUsage)
		return usagef("no command given")
	}
	cmd, rest := args[0], args[1:]
	switch cmd {
	case "serve":
		return runServe(ctx, rest, stdout, stderr)
	case "demo":
		return runDemo(ctx, rest, stdout, stderr)
	case "migrate":
		return runMigrate(ctx, rest, stdout, stderr)
	case "audit":
		return runAudit(ctx, rest, stdout, stderr)
	case "verify":
		return runVerify(ctx, rest, stdout, stderr)
	case "ingest":
		return runIngest(ctx, rest, stdout, stderr)
	case "rules":
		return runRules(ctx, rest, stdout, stderr)
	case "help", "-h", "--help", "-help":
		fmt.Fprint(stdout, topUsage)
		return nil
	default:
		fmt.Fprint(stderr, topUsage)
		return usagef("unknown command %q", cmd)
	}
}

// newFlagSet returns a flag set for a subcommand whose errors are returned,
// not printed-and-exited, with usage text on stderr.
func newFlagSet(name, synopsis string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "Usage: classwatch %s\n\nFlags:\n", synopsis)
		fs.PrintDefaults()
	}
	return fs
}

// parseFlags parses args, turning a flag error into a usage error and
// refusing stray positional arguments unless allowed.
func parseFlags(fs *flag.FlagSet, args []string, positional int) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return usageError{err.Error()}
	}
	if positional >= 0 && fs.NArg() != positional {
		fs.Usage()
		return usagef("%s: expected %d argument(s), got %d", fs.Name(), positional, fs.NArg())
	}
	return nil
}
