package backtest

import (
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/alerts"
)

// TestCUSUMReplay replays a cusum rule, which reads its own week of
// matured buckets beyond any window, and compares it with the recount:
// the same episodes, and one during the bad day.
func TestCUSUMReplay(t *testing.T) {
	h := generate(1)
	st := openStore(t, h)
	opts := testOptions(st)
	opts.Rules = []alerts.Rule{{
		Name: "recall-cusum", Kind: alerts.KindCUSUM, Model: screen, Schedule: "0 * * * *",
		Classes: []string{"fraud"}, Lag: 8 * time.Hour, Expected: 0.9, Shift: 0.3, FalseAlarmEvery: 30 * 24 * time.Hour,
	}}
	got, err := Run(t.Context(), opts)
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	want := recount(t, st, h, opts)
	r := got.Rules[0]
	if r.Evaluations != want.Rules[0].Evaluations || !slices.EqualFunc(r.Episodes, want.Rules[0].Episodes, sameEpisode) {
		t.Errorf("sweep %d evaluations %s\nrecount %d evaluations %s", r.Evaluations, formatEpisodes(r.Episodes),
			want.Rules[0].Evaluations, formatEpisodes(want.Rules[0].Episodes))
	}
	bad := func(e Episode) bool { return e.FiringAt.After(day(4)) && e.FiringAt.Before(day(5.5)) }
	if !slices.ContainsFunc(r.Episodes, bad) {
		t.Errorf("episodes %s; want one firing during the bad day", formatEpisodes(r.Episodes))
	}
}
