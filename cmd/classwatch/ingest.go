package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/collector"
)

// runIngest is "classwatch ingest predictions|labels FILE": a bulk
// backfill straight into the store, judged line by line exactly as the HTTP
// endpoints judge a body, committed in batches.
func runIngest(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("ingest", "ingest [--config F] [--database URL] predictions|labels FILE.ndjson", stderr)
	sf := addStoreFlags(fs)
	quiet := fs.Bool("quiet", false, "no progress lines")
	if err := parseFlags(fs, args, 2); err != nil {
		return err
	}
	kind, file := fs.Arg(0), fs.Arg(1)
	if kind != "predictions" && kind != "labels" {
		fs.Usage()
		return usagef("ingest: first argument must be predictions or labels, not %q", kind)
	}
	f, err := os.Open(file)
	if err != nil {
		return fmt.Errorf("ingest: %w", err)
	}
	defer f.Close()
	cfg, st, err := sf.open(ctx, true)
	if err != nil {
		return err
	}
	defer st.Close()
	copts := cfg.collectorOptions()
	copts.Store = st
	copts.Registerer = prometheus.NewRegistry()
	copts.Limits.MaxFuture = -1 // a backfill is history, judged against no clock
	col, err := collector.New(copts)
	if err != nil {
		return fmt.Errorf("ingest: %w", err)
	}
	if err := col.Prepare(ctx); err != nil {
		return fmt.Errorf("register models: %w", err)
	}

	bopts := collector.BatchOptions{BatchLines: cfg.Ingest.BatchLines, Rejected: func(rej []collector.LineError) {
		for _, r := range rej {
			fmt.Fprintf(stdout, "%s:%d: %s\n", file, r.Line, r.Error)
		}
	}}
	if !*quiet {
		bopts.Progress = func(p collector.Progress) {
			fmt.Fprintf(stderr, "\r%s: %d lines: %d accepted, %d duplicates, %d rejected",
				file, p.Line, p.Accepted, p.Duplicates, p.Rejected)
		}
	}
	bopts.Format = collector.NDJSON
	if strings.HasSuffix(file, ".json") {
		bopts.Format = collector.JSON
	}
	k := collector.Predictions
	if kind == "labels" {
		k = collector.Labels
	}
	res, err := col.Ingest(ctx, k, f, bopts)
	if !*quiet {
		fmt.Fprintln(stderr)
	}
	fmt.Fprintf(stdout, "%s: %d accepted, %d duplicates, %d rejected\n", file, res.Accepted, res.Duplicates, len(res.Rejected)+res.RejectedOmitted)
	var se *collector.StoreError
	if errors.As(err, &se) {
		return fmt.Errorf("ingest: lines %d-%d were not stored (%w); everything before line %d is committed, resume from there",
			se.FirstLine, se.LastLine, se.Err, se.FirstLine)
	}
	if err != nil {
		return fmt.Errorf("ingest: %w", err)
	}
	return nil
}
