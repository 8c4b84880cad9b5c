// Command classwatch watches deployed classifiers: it joins logged
// predictions with late ground-truth labels, keeps per-bucket confusion
// matrices, exports rolling-window metrics to Prometheus, raises alerts and
// answers audit questions. Run "classwatch help" for the subcommands.
package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strings"
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

// command is one subcommand: its name, a one-line summary for the help
// text and its entry point.
type command struct {
	name, summary string
	run           func(ctx context.Context, args []string, stdout, stderr io.Writer) error
}

// commands lists the subcommands in the order the help shows them.
func commands() []command {
	return []command{
		{"serve", "run the daemon: ingest, windows, /metrics, alerts, pages", runServe},
		{"demo", "run a simulated deployment on the embedded store and print its URL", runDemo},
		{"migrate", "apply pending schema migrations to the store", runMigrate},
		{"audit", "print one model's confusion matrix and metrics for a past period", runAudit},
		{"verify", "recompute every cell from the raw rows and report any difference", runVerify},
		{"ingest", "bulk backfill NDJSON predictions or labels into the store", runIngest},
		{"rules", "check a config file's alert rules without starting, or backtest them over stored history", runRules},
	}
}

// run dispatches to a subcommand. It is main without the process: tests
// call it with their own context, arguments and writers.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		printSummary(stderr)
		return usagef("no command given")
	}
	name, rest := args[0], args[1:]
	for _, c := range commands() {
		if c.name == name {
			return c.run(ctx, rest, stdout, stderr)
		}
	}
	switch name {
	case "help", "-h", "--help", "-help":
		printHelp(ctx, stdout)
		return nil
	}
	printSummary(stderr)
	return usagef("unknown command %q", name)
}

// printSummary prints the commands, one line each.
func printSummary(w io.Writer) {
	fmt.Fprint(w, "classwatch watches classifiers in production.\n\nUsage: classwatch COMMAND [flags] [arguments]\n\nCommands:\n")
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-8s %s\n", c.name, c.summary)
	}
	fmt.Fprint(w, "\nRun \"classwatch help\" for every command's flags.\n")
}

// printHelp prints the summary, then each command's own usage text (its
// synopsis and flags), so the two can never disagree.
func printHelp(ctx context.Context, w io.Writer) {
	printSummary(w)
	for _, c := range commands() {
		var usage bytes.Buffer
		_ = c.run(ctx, []string{"-h"}, io.Discard, &usage)
		fmt.Fprintf(w, "\n%s: %s\n", c.name, c.summary)
		for _, line := range strings.Split(strings.TrimRight(usage.String(), "\n"), "\n") {
			if line == "" {
				fmt.Fprintln(w)
				continue
			}
			fmt.Fprintf(w, "    %s\n", line)
		}
	}
}

// newFlagSet returns a flag set for a subcommand whose errors are returned,
// not printed-and-exited, with usage text on stderr.
func newFlagSet(name, synopsis string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "Usage: classwatch %s\n", synopsis)
		n := 0
		fs.VisitAll(func(*flag.Flag) { n++ })
		if n > 0 {
			fmt.Fprint(stderr, "\nFlags:\n")
			fs.PrintDefaults()
		}
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
