package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"syscall"
)

// runServe is "classwatch serve": load the config, wire the daemon and serve
// until SIGINT/SIGTERM; SIGHUP reloads the TLS certificate.
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
	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	d, err := newDaemon(ctx, cfg, log)
	if err != nil {
		return err
	}
	d.hup = hup
	// The address is known, and /readyz answers, before the store is
	// reached.
	fmt.Fprintf(stdout, "classwatch listening on %s/\n", d.baseURL())
	if err := d.start(ctx); err != nil {
		return err
	}
	return d.serve(ctx)
}

// newLogger returns the process logger writing to w.
func newLogger(w io.Writer, jsonLines bool) *slog.Logger {
	if jsonLines {
		return slog.New(slog.NewJSONHandler(w, nil))
	}
	return slog.New(slog.NewTextHandler(w, nil))
}
