package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"time"

	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
)

// runAudit is "classwatch audit": one model's confusion matrix and figures
// over a past, bucket-aligned period, optionally as known at an earlier time;
// --format html writes the self-contained audit report (README "Pages and
// the audit report").
func runAudit(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("audit", "audit --model M --from T --to T [--as-of T] [--segment S] [--format table|json|csv|html]", stderr)
	sf := addStoreFlags(fs)
	model := fs.String("model", "", "the `model` to report on (required)")
	from := fs.String("from", "", "period start, RFC 3339, aligned to the model's bucket (required)")
	to := fs.String("to", "", "period end (exclusive), RFC 3339, aligned to the bucket (required)")
	asOf := fs.String("as-of", "", "report the labels as known at this RFC 3339 `time` (default: now)")
	segment := fs.String("segment", "", "restrict to one `segment`")
	format := fs.String("format", "table", "output `format`: table, json, csv, or html (the self-contained audit report)")
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	if *model == "" || *from == "" || *to == "" {
		fs.Usage()
		return usagef("audit: --model, --from and --to are required")
	}
	switch *format {
	case "table", "json", "csv", "html":
	default:
		return usagef("audit: --format %q is not table, json, csv or html", *format)
	}
	q := api.MatrixQuery{Model: *model}
	var err error
	if q.From, err = parseTimeFlag("from", *from); err != nil {
		return err
	}
	if q.To, err = parseTimeFlag("to", *to); err != nil {
		return err
	}
	if *asOf != "" {
		t, err := parseTimeFlag("as-of", *asOf)
		if err != nil {
			return err
		}
		q.AsOf = &t
	}
	fs.Visit(func(f *flag.Flag) {
		if f.Name == "segment" {
			q.Segment = segment
		}
	})

	cfg, st, err := sf.open(ctx, false)
	if err != nil {
		return err
	}
	defer st.Close()
	q.Bucket, _ = cfg.modelWindows(*model)
	var rep api.Report
	var au api.Audit
	if *format == api.FormatHTML {
		au, err = api.BuildAudit(ctx, st, q, time.Now().UTC(), cfg.Confidence)
	} else {
		rep, err = api.MatrixReport(ctx, st, q, time.Now().UTC(), cfg.Confidence)
	}
	var reqErr *api.RequestError
	switch {
	case errors.As(err, &reqErr):
		return usagef("audit: %s", reqErr.Msg)
	case errors.Is(err, store.ErrUnknownModel):
		return fmt.Errorf("audit: unknown model %q", *model)
	case err != nil:
		return fmt.Errorf("audit: %w", err)
	}
	if *format == api.FormatHTML {
		return api.WriteAuditHTML(stdout, au)
	}
	return api.WriteReport(stdout, rep, *format)
}

// parseTimeFlag parses an RFC 3339 flag value, naming the flag on error.
func parseTimeFlag(name, v string) (time.Time, error) {
	t, err := time.Parse(time.RFC3339Nano, v)
	if err != nil {
		return time.Time{}, usagef("--%s: %q is not an RFC 3339 time (like 2026-03-01T00:00:00Z)", name, v)
	}
	return t.UTC(), nil
}
