package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"text/tabwriter"
	"time"

	"github.com/classwatch/classwatch/alerts/backtest"
)

// runBacktest is "classwatch rules backtest": replay the config's alert
// rules over the stored history as the daemon would have evaluated them,
// and report each rule's episodes (README.md "Rule backtest").
func runBacktest(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("rules backtest", "rules backtest --config F --from T --to T [--rule NAME] [--format table|json] [--database URL]", stderr)
	sf := addStoreFlags(fs)
	fromFlag := fs.String("from", "", "replay start, RFC 3339 (required)")
	toFlag := fs.String("to", "", "replay end (exclusive), RFC 3339 (required)")
	rule := fs.String("rule", "", "replay only the rule of this `name`")
	format := fs.String("format", "table", "output `format`: table or json")
	if err := parseFlags(fs, args, 0); err != nil {
		return err
	}
	if *sf.config == "" || *fromFlag == "" || *toFlag == "" {
		fs.Usage()
		return usagef("rules backtest: --config, --from and --to are required")
	}
	if *format != "table" && *format != "json" {
		return usagef("rules backtest: --format %q is not table or json", *format)
	}
	from, err := parseTimeFlag("from", *fromFlag)
	if err != nil {
		return err
	}
	to, err := parseTimeFlag("to", *toFlag)
	if err != nil {
		return err
	}
	if !from.Before(to) {
		return usagef("rules backtest: --from %s is not before --to %s", *fromFlag, *toFlag)
	}
	cfg, st, err := sf.open(ctx, false)
	if err != nil {
		return err
	}
	defer st.Close()
	rep, err := backtest.Run(ctx, backtest.Options{
		Store: st, Rules: cfg.rules, Tracker: cfg.trackerOptions(), Windows: cfg.allWindows(),
		Confidence: cfg.Confidence, From: from, To: to, Rule: *rule,
	})
	if errors.Is(err, backtest.ErrInput) {
		return usagef("rules backtest: %v", err)
	}
	if err != nil {
		return fmt.Errorf("rules backtest: %w", err)
	}
	if *format == "json" {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	return writeBacktestTable(stdout, rep)
}

// writeBacktestTable prints one summary line per rule, then the episodes.
func writeBacktestTable(w io.Writer, rep backtest.Report) error {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "replayed %s to %s (%.1f days)\n\n", rep.From.Format(time.RFC3339), rep.To.Format(time.RFC3339), rep.To.Sub(rep.From).Hours()/24)
	fmt.Fprintln(tw, "RULE\tKIND\tEVALUATIONS\tEPISODES\tPER 30 DAYS\tHOURS FIRING")
	for _, r := range rep.Rules {
		fmt.Fprintf(tw, "%s\t%s\t%d\t%d\t%.2f\t%.1f\n", r.Rule, r.Kind, r.Evaluations, len(r.Episodes),
			r.PerThirtyDays(rep.From, rep.To), r.FiringHours(rep.To))
	}
	fmt.Fprintln(tw, "\nRULE\tMODEL\tCLASS\tPREDICTED\tFIRING AT\tRESOLVED AT")
	for _, r := range rep.Rules {
		for _, e := range r.Episodes {
			end := "(still firing)"
			if e.ResolvedAt != nil {
				end = e.ResolvedAt.Format(time.RFC3339)
			}
			fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\n", r.Rule, e.Model, orDash(e.Class), orDash(e.Predicted), e.FiringAt.Format(time.RFC3339), end)
		}
	}
	return tw.Flush()
}

func orDash(s *string) string {
	if s == nil {
		return "-"
	}
	return *s
}
