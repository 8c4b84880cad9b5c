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
	sf := addStoreFlags(fs)
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	_, st, err := sf.open(ctx, false)
	if err != nil {
		return err
	}
	defer st.Close()
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
