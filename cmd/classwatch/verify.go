package main

import (
	"context"
	"fmt"
	"io"
	"time"
)

// runVerify is "classwatch verify": recompute every cell and predicted
// count from the raw rows still kept and report each difference. It exits
// non-zero when any is found.
func runVerify(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("verify", "verify [--config F] [--database URL]", stderr)
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
	if err := st.Ping(ctx); err != nil {
		return fmt.Errorf("verify: %w", err)
	}
	diffs, err := st.Verify(ctx)
	if err != nil {
		return fmt.Errorf("verify: %w", err)
	}
	for _, d := range diffs {
		fmt.Fprintf(stdout, "%s %s bucket=%s segment=%q actual=%q predicted=%q stored=%d recounted=%d\n",
			d.Model, d.Kind, d.Bucket.UTC().Format(time.RFC3339), d.Segment, d.Actual, d.Predicted, d.Stored, d.Recounted)
	}
	if len(diffs) > 0 {
		return fmt.Errorf("verify: %d count(s) differ from the raw rows", len(diffs))
	}
	fmt.Fprintln(stdout, "verify: every count matches the raw rows")
	return nil
}
