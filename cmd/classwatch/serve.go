package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
)

// runServe is "classwatch serve": load the config, wire the daemon and serve
// until SIGINT/SIGTERM.
func runServe(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("serve", "serve [--config F] [--listen ADDR] [--database URL]", stderr)
	path := fs.String("config", "", "config `file` (YAML); without it, the defaults")
	listen := fs.String("listen", "", "listen `address`, overriding the config's listen")
	database := fs.String("database", "", "PostgreSQL `URL`, overriding the config and "+databaseURLEnv)
	logJSON := fs.Bool("log-json", false, "log JSON lines instead of text")
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	cfg, err := loadConfig(configSource{path: *path, listen: *listen, database: *database, secrets: true})
	if err != nil {
		return err
	}
	log := newLogger(stderr, *logJSON)
	d, err := newDaemon(ctx, cfg, log)
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "classwatch listening on http://%s/\n", d.addr())
	return d.serve(ctx)
}

// newLogger returns the process logger writing to w.
func newLogger(w io.Writer, jsonLines bool) *slog.Logger {
	if jsonLines {
		return slog.New(slog.NewJSONHandler(w, nil))
	}
	return slog.New(slog.NewTextHandler(w, nil))
}
