package main

import (
	"context"
	"fmt"
	"io"
)

// runRules is "classwatch rules check F": validate a config file, its
// alerts and notifiers sections included, without starting anything; and
// "classwatch rules backtest" (backtest.go).
func runRules(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) > 0 && args[0] == "backtest" {
		return runBacktest(ctx, args[1:], stdout, stderr)
	}
	fs := newFlagSet("rules", "rules check FILE | rules backtest --config F --from T --to T", stderr)
	if err := parseFlags(fs, args, -1); err != nil {
		return err
	}
	if fs.Arg(0) != "check" {
		fs.Usage()
		return usagef("rules: unknown subcommand %q (want check or backtest)", fs.Arg(0))
	}
	check := newFlagSet("rules check", "rules check FILE", stderr)
	if err := parseFlags(check, fs.Args()[1:], 1); err != nil {
		return err
	}
	// The loader serve uses, so a file that passes here starts; secrets
	// stay in the environment of the daemon.
	file := check.Arg(0)
	if _, err := loadConfig(configSource{path: file}); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s: config and rules are valid\n", file)
	return nil
}
