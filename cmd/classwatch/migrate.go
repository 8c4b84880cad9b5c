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
	path := fs.String("config", "", "config `file` (YAML)")
	database := fs.String("database", "", "PostgreSQL `URL`, overriding the config and "+databaseURLEnv)
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	cfg, err := loadConfigWithFlags(*path, "", *database)
	if err != nil {
		return err
	}
	st, err := openStore(ctx, cfg)
	if err != nil {
		return err
	}
	defer st.Close()
	if err := st.Migrate(ctx); err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	fmt.Fprintln(stdout, "schema is up to date")
	return nil
}
