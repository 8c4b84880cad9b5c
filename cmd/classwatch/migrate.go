package main

import (
	"context"
	"fmt"
	"io"
)

// runMigrate is "classwatch migrate": apply pending schema migrations and
// exit. serve does the same at start; this is for deploy pipelines that
// migrate before rolling out.
func runMigrate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("migrate", "migrate [--config F] [--database URL]", stderr)
	sf := addStoreFlags(fs)
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	_, st, err := sf.open(ctx, true)
	if err != nil {
		return err
	}
	if err := st.Close(); err != nil {
		return fmt.Errorf("close store: %w", err)
	}
	fmt.Fprintln(stdout, "schema is up to date")
	return nil
}
