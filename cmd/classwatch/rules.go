package main

import (
	"context"
	"fmt"
	"io"

	"github.com/classwatch/classwatch/alerts"
)

// runRules is "classwatch rules check F": validate the alerts and notifiers
// sections of a config file without starting anything.
func runRules(_ context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("rules", "rules check FILE", stderr)
	if err := parseFlags(fs, args, 2); err != nil {
		return err
	}
	if fs.Arg(0) != "check" {
		fs.Usage()
		return usagef("rules: unknown subcommand %q (want check)", fs.Arg(0))
	}
	file := fs.Arg(1)
	if err := alerts.CheckFile(file); err != nil {
		return fmt.Errorf("%s: %w", file, err)
	}
	fmt.Fprintf(stdout, "%s: rules are valid\n", file)
	return nil
}
