package backtest

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// The test history: a fictional bank's card screen (legit/fraud, recall
// 0.9 except on day 5, when it falls to 0.4) and its support desk's ticket
// router (three queues, whose output mix shifts on day 6 and which sends
// nothing for five hours of day 7). The screen sends a fraud score with
// most predictions: confident and fairly calibrated, except that it stays
// as confident on the bad day (so its calibration error rises) and that
// its fraud scores crowd toward the middle on the second half of day 6.
// Labels come 0–8 hours late, some
// before their prediction is logged, a few are corrected, and frauds
// never confirmed get the default label after 36 hours.
const (
	screen = "card-screen"
	router = "ticket-router"
	bucket = time.Hour
)

var origin = time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC)

func day(d float64) time.Time { return origin.Add(time.Duration(d * 24 * float64(time.Hour))) }

// history is what the generator sent: predictions and label versions, and
// the prediction times per model for the reference's silence figures.
type history struct {
	preds  []store.Prediction
	labels []store.Label
	times  map[string][]time.Time
}

func generate(seed uint64) history {
	rng := rand.New(rand.NewPCG(seed, 0x6261636b74657374))
	scoreRNG := rand.New(rand.NewPCG(seed, 0x73636f726573)) // apart, so the rest of the history stays as it was
	h := history{times: map[string][]time.Time{}}
	for hour := range 8 * 24 {
		start := origin.Add(time.Duration(hour) * time.Hour)
		for i := range 30 {
			at := start.Add(time.Duration(rng.IntN(3600)) * time.Second)
			id := fmt.Sprintf("s%d-%d", hour, i)
			actual := "legit"
			if rng.Float64() < 0.25 {
				actual = "fraud"
			}
			recall := 0.9
			if at.After(day(4)) && at.Before(day(5)) {
				recall = 0.4
			}
			predicted := actual
			if (actual == "fraud" && rng.Float64() > recall) || (actual == "legit" && rng.Float64() < 0.05) {
				predicted = map[string]string{"fraud": "legit", "legit": "fraud"}[actual]
			}
			h.preds = append(h.preds, store.Prediction{Model: screen, ID: id, At: at, Bucket: at.Truncate(bucket), Predicted: predicted,
				Scores: screenScores(scoreRNG, at, predicted)})
			h.times[screen] = append(h.times[screen], at)
			if actual == "fraud" && rng.IntN(10) == 0 {
				continue // never confirmed: implied legit after the timeout
			}
			late := time.Duration(rng.IntN(8*3600)) * time.Second
			if rng.IntN(20) == 0 {
				late = -time.Duration(rng.IntN(600)) * time.Second // known before the log line
			}
			h.labels = append(h.labels, store.Label{Model: screen, ID: id, Actual: actual, At: at.Add(late)})
			if rng.IntN(100) == 0 {
				other := map[string]string{"fraud": "legit", "legit": "fraud"}[actual]
				h.labels = append(h.labels, store.Label{Model: screen, ID: id, Actual: other, At: at.Add(late + 2*time.Hour)})
			}
		}
		if start.After(day(6.5)) && start.Before(day(6.5).Add(5*time.Hour)) {
			continue // the router is silent
		}
		for i := range 15 {
			at := start.Add(time.Duration(rng.IntN(3600)) * time.Second)
			queues := []string{"billing", "access", "outage"}
			k := rng.IntN(3)
			if at.After(day(5.5)) && at.Before(day(6)) && rng.IntN(2) == 0 {
				k = 2 // an outage floods the third queue
			}
			id := fmt.Sprintf("r%d-%d", hour, i)
			h.preds = append(h.preds, store.Prediction{Model: router, ID: id, At: at, Bucket: at.Truncate(bucket), Predicted: queues[k]})
			h.times[router] = append(h.times[router], at)
			actual := queues[k]
			if rng.IntN(5) == 0 {
				actual = queues[rng.IntN(3)]
			}
			h.labels = append(h.labels, store.Label{Model: router, ID: id, Actual: actual, At: at.Add(time.Duration(rng.IntN(6*3600)) * time.Second)})
		}
	}
	return h
}

// screenScores returns a screen prediction's scores: none for one in ten,
// only the predicted class's for another one in ten (the other counts as
// 0), else both.
func screenScores(rng *rand.Rand, at time.Time, predicted string) map[string]float64 {
	u := rng.Float64()
	conf := 0.9 + 0.1*u
	if predicted == "fraud" {
		conf = 0.6 + 0.4*u
	}
	if at.After(day(5.5)) && at.Before(day(6)) {
		conf = 0.5 + 0.2*u
	}
	switch rng.IntN(10) {
	case 0:
		return nil
	case 1:
		return map[string]float64{predicted: conf}
	}
	other := map[string]string{"fraud": "legit", "legit": "fraud"}[predicted]
	return map[string]float64{predicted: conf, other: 1 - conf}
}

func openStore(t *testing.T, h history) store.Store {
	t.Helper()
	ctx := t.Context()
	st, err := sqlitestore.Open(ctx, filepath.Join(t.TempDir(), "cw.db"), sqlitestore.Options{RelaxedSync: true})
	if err != nil {
		t.Fatalf("open store: %v", err)
	}
	t.Cleanup(func() { st.Close() })
	if err := st.Migrate(ctx); err != nil {
		t.Fatalf("migrate: %v", err)
	}
	fill(t, st, h)
	return st
}

// fill stores history h in st.
func fill(t *testing.T, st store.Store, h history) {
	t.Helper()
	ctx := t.Context()
	for model, classes := range map[string][]string{screen: {"legit", "fraud"}, router: {"billing", "access", "outage"}} {
		if _, err := st.EnsureModel(ctx, model, classes, 0); err != nil {
			t.Fatalf("register %s: %v", model, err)
		}
	}
	end := day(9)
	for b := range slices.Chunk(h.preds, 5000) {
		if _, err := st.IngestPredictions(ctx, b, end); err != nil {
			t.Fatalf("ingest predictions: %v", err)
		}
	}
	for b := range slices.Chunk(h.labels, 5000) {
		if _, err := st.IngestLabels(ctx, b, end); err != nil {
			t.Fatalf("ingest labels: %v", err)
		}
	}
	if _, _, err := st.ApplyLabelTimeout(ctx, screen, "legit", 36*time.Hour, end); err != nil {
		t.Fatalf("apply label timeout: %v", err)
	}
}

// testWindows: twelve hours whose labels had eight hours to come, and
// three matured days before the latest one as the reference.
var testWindows = []windows.Window{{Name: "12h", Length: 12 * time.Hour, Lag: 8 * time.Hour}, {Name: "ref", Length: 72 * time.Hour, Lag: 24 * time.Hour}}

func testRules() []alerts.Rule {
	ref := alerts.Reference{Window: "ref"}
	fixed := alerts.Reference{From: day(0), To: day(2)}
	hourly := "0 * * * *"
	return []alerts.Rule{
		{Name: "recall-floor", Kind: alerts.KindFloor, Model: screen, Window: "12h", Schedule: hourly, Metric: "recall", Classes: []string{"fraud"}, Threshold: 0.8, FireAfter: 2},
		{Name: "recall-drop", Kind: alerts.KindDrop, Model: screen, Window: "12h", Schedule: "*/30 * * * *", Classes: []string{"fraud"}, Margin: 0.05, Reference: ref, ResolveAfter: 2},
		{Name: "recall-drop-fixed", Kind: alerts.KindDrop, Model: screen, Window: "12h", Schedule: hourly, Classes: []string{"fraud"}, Reference: fixed},
		{Name: "missed-fraud", Kind: alerts.KindConfusionRise, Model: screen, Window: "12h", Schedule: hourly, Pairs: []alerts.Pair{{Actual: "fraud", Predicted: "legit"}}, Reference: ref},
		{Name: "mix", Kind: alerts.KindPrevalenceShift, Model: alerts.AllModels, Window: "12h", Schedule: hourly, Reference: ref},
		{Name: "queues", Kind: alerts.KindOutputShift, Model: alerts.AllModels, Window: "12h", Schedule: hourly, Reference: ref, PSIThreshold: 0.1},
		{Name: "fraud-scores", Kind: alerts.KindScoreShift, Model: screen, Window: "12h", Schedule: hourly, Classes: []string{"fraud"}, Reference: ref, Threshold: 0.1},
		{Name: "calibration", Kind: alerts.KindCeiling, Model: screen, Window: "12h", Schedule: hourly, Metric: "calibration_error", Interval: alerts.IntervalNone, Threshold: 0.08},
		{Name: "quiet", Kind: alerts.KindNoTraffic, Model: alerts.AllModels, Schedule: "*/20 * * * *", QuietFor: 2 * time.Hour},
	}
}

func testOptions(st store.Store) Options {
	return Options{
		Store: st, Rules: testRules(), Windows: testWindows,
		Tracker: windows.TrackerOptions{DefaultBucket: bucket, DefaultWindows: testWindows},
		From:    day(2), To: day(8),
	}
}

// TestReplayMatchesRecount replays every kind of rule and compares the
// episodes with a replay that recounts each window from the store's own
// as-of read (CountsAsOf) at every evaluation: the slow, obviously
// as-of path the sweep replaces.
func TestReplayMatchesRecount(t *testing.T) {
	h := generate(1)
	st := openStore(t, h)
	matchRecount(t, st, h, testOptions(st))
}

// TestReplayGroupedMatchesSQLite replays the same history, without the
// rules that read scores, on PostgreSQL, whose store then groups the
// prediction events by the rules' 10-minute evaluation grain
// (store.EventQuery.Step), and on SQLite, which does not group and whose
// replay TestReplayMatchesRecount checks against the recount: the
// episodes must be the same.
func TestReplayGroupedMatchesSQLite(t *testing.T) {
	h := generate(1)
	pg := pgstoretest.Open(t, pgtest.URL(t))
	fill(t, pg, h)
	opts := testOptions(pg)
	opts.Rules = slices.DeleteFunc(opts.Rules, readsScores)
	if len(opts.Rules) != len(testRules())-2 {
		t.Fatalf("%d rules left without the two that read scores", len(opts.Rules))
	}
	q := eventQuery(opts, screen, day(0), bucket, mustPlans(t, opts))
	if q.Scores || q.Step != 10*time.Minute {
		t.Fatalf("event query %+v: want grouping by the 10-minute grain of hourly, half-hourly and 20-minute schedules and no scores", q)
	}
	got, err := Run(t.Context(), opts)
	if err != nil {
		t.Fatalf("Run on PostgreSQL: %v", err)
	}
	opts.Store = openStore(t, h)
	want, err := Run(t.Context(), opts)
	if err != nil {
		t.Fatalf("Run on SQLite: %v", err)
	}
	episodes := 0
	for i, r := range got.Rules {
		episodes += len(r.Episodes)
		if r.Rule != want.Rules[i].Rule || r.Evaluations != want.Rules[i].Evaluations || !slices.EqualFunc(r.Episodes, want.Rules[i].Episodes, sameEpisode) {
			t.Errorf("rule %s:\n grouped (PostgreSQL) %d evaluations %s\n single (SQLite)      %d evaluations %s", r.Rule,
				r.Evaluations, formatEpisodes(r.Episodes), want.Rules[i].Evaluations, formatEpisodes(want.Rules[i].Episodes))
		}
	}
	if episodes < len(opts.Rules) {
		t.Errorf("%d episodes in all; the history should trip most rules", episodes)
	}
}

func mustPlans(t *testing.T, opts Options) []*plan {
	t.Helper()
	plans, err := plansOf(opts, &Report{})
	if err != nil {
		t.Fatal(err)
	}
	return plans
}

// matchRecount runs the replay and the recount of opts and compares them.
func matchRecount(t *testing.T, st store.Store, h history, opts Options) {
	t.Helper()
	began := time.Now()
	got, err := Run(t.Context(), opts)
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	t.Logf("sweep: %s", time.Since(began))
	began = time.Now()
	want := recount(t, st, h, opts)
	t.Logf("recount: %s", time.Since(began))
	for i, r := range got.Rules {
		if r.Rule != want.Rules[i].Rule || r.Evaluations != want.Rules[i].Evaluations || !slices.EqualFunc(r.Episodes, want.Rules[i].Episodes, sameEpisode) {
			t.Errorf("rule %s:\n sweep   %d evaluations %s\n recount %d evaluations %s", r.Rule,
				r.Evaluations, formatEpisodes(r.Episodes), want.Rules[i].Evaluations, formatEpisodes(want.Rules[i].Episodes))
		}
	}
	// The history was made to trip these rules; a replay that found
	// nothing would agree with the recount and prove nothing.
	byName := map[string]RuleReport{}
	for _, r := range got.Rules {
		byName[r.Rule] = r
	}
	bad := func(e Episode) bool { return e.FiringAt.After(day(4)) && e.FiringAt.Before(day(5.5)) }
	if r := byName["recall-floor"]; r.Evaluations != 6*24 || !slices.ContainsFunc(r.Episodes, bad) {
		t.Errorf("recall-floor: %d evaluations, episodes %s; want 144 hourly evaluations and a firing during the bad day", r.Evaluations, formatEpisodes(r.Episodes))
	}
	if r := byName["quiet"]; len(r.Episodes) != 1 || *r.Episodes[0].ResolvedAt != day(6.5).Add(5*time.Hour).Add(20*time.Minute) {
		t.Errorf("quiet: episodes %s, want one for the router's five silent hours", formatEpisodes(r.Episodes))
	}
	for _, name := range []string{"recall-drop", "recall-drop-fixed", "queues", "fraud-scores", "calibration"} {
		if r, ok := byName[name]; ok && len(r.Episodes) == 0 {
			t.Errorf("%s: no episode; the history should trip it", name)
		}
	}
}

func sameEpisode(a, b Episode) bool {
	return a.Model == b.Model && deref(a.Class) == deref(b.Class) && deref(a.Predicted) == deref(b.Predicted) &&
		a.FiringAt.Equal(b.FiringAt) && (a.ResolvedAt == nil) == (b.ResolvedAt == nil) &&
		(a.ResolvedAt == nil || a.ResolvedAt.Equal(*b.ResolvedAt))
}

func formatEpisodes(es []Episode) string {
	var b strings.Builder
	for _, e := range es {
		end := "-"
		if e.ResolvedAt != nil {
			end = e.ResolvedAt.Format("01-02T15:04")
		}
		fmt.Fprintf(&b, " [%s %s %s %s→%s]", e.Model, deref(e.Class), deref(e.Predicted), e.FiringAt.Format("01-02T15:04"), end)
	}
	return b.String()
}

func TestBadInput(t *testing.T) {
	st := openStore(t, history{})
	ctx := t.Context()
	opts := testOptions(st)
	opts.From, opts.To = day(3), day(2)
	if _, err := Run(ctx, opts); !errors.Is(err, ErrInput) || !strings.Contains(err.Error(), "not before") {
		t.Errorf("from after to: %v, want ErrInput saying so", err)
	}
	opts = testOptions(st)
	opts.Rule = "no-such-rule"
	if _, err := Run(ctx, opts); !errors.Is(err, ErrInput) || !strings.Contains(err.Error(), "no-such-rule") {
		t.Errorf("unknown rule: %v, want ErrInput naming it", err)
	}
	if _, err := st.PurgeRaw(ctx, screen, day(3)); err != nil {
		t.Fatalf("purge: %v", err)
	}
	opts = testOptions(st)
	opts.From = day(7) // the 96-hour reference reaches back to day 3
	opts.Rule = "recall-drop"
	if _, err := Run(ctx, opts); err != nil {
		t.Errorf("a replay within the retained rows: %v", err)
	}
	opts.From = day(6)
	if _, err := Run(ctx, opts); !errors.Is(err, ErrInput) || !errors.Is(err, store.ErrPurged) {
		t.Errorf("a window reaching into purged rows: %v, want ErrInput and ErrPurged", err)
	}
}

// recount replays opts's rules the slow way: at every scheduled time each
// window is read with CountsAsOf, through the same evaluators.
func recount(t *testing.T, st store.Store, h history, opts Options) Report {
	t.Helper()
	ctx := t.Context()
	rep := Report{From: opts.From, To: opts.To}
	plans, err := plansOf(opts, &rep)
	if err != nil {
		t.Fatal(err)
	}
	infos, err := st.Models(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range plans {
		for _, info := range infos {
			if p.rule.Model != info.Name && p.rule.Model != alerts.AllModels {
				continue
			}
			slow := &recountStore{st: st, info: info, times: h.times[info.Name]}
			view := func(model, window string) (windows.View, bool) {
				i := slices.IndexFunc(testWindows, func(w windows.Window) bool { return w.Name == window })
				w := testWindows[i]
				wm := windows.Watermark(slow.at, bucket)
				from, to := w.Bounds(wm)
				c, err := slow.Counts(ctx, store.Query{Model: model, From: from, To: to})
				if err != nil {
					t.Fatal(err)
				}
				m, pred, err := windows.FromCounts(info.Classes, c)
				if err != nil {
					t.Fatal(err)
				}
				scores, err := windows.ScoresFromCounts(info.Classes, c)
				if err != nil {
					t.Fatal(err)
				}
				return windows.View{Model: model, Window: w, From: from, To: to, Watermark: wm, Matrix: m, Predicted: pred, Scores: scores}, true
			}
			slow.at = opts.From
			watermark := func(string) (time.Time, bool) { return windows.Watermark(slow.at, bucket), true }
			m, err := alerts.New(alerts.Options{Store: slow, View: view, Watermark: watermark, Rules: []alerts.Rule{p.rule}, Now: func() time.Time { return slow.at }})
			if err != nil {
				t.Fatal(err)
			}
			for at := first(p.schedule, opts.From); at.Before(opts.To); at = p.schedule.Next(at) {
				slow.at = at
				if err := m.Evaluate(ctx, at); err != nil {
					t.Fatalf("recount %s at %s: %v", p.rule.Name, at, err)
				}
			}
			eps, err := slow.asOf.episodes()
			if err != nil {
				t.Fatal(err)
			}
			p.report.Episodes = append(p.report.Episodes, eps[p.rule.Name]...)
		}
		slices.SortStableFunc(p.report.Episodes, func(a, b Episode) int {
			if c := a.FiringAt.Compare(b.FiringAt); c != 0 {
				return c
			}
			return strings.Compare(a.Model, b.Model)
		})
	}
	return rep
}

// recountStore answers the evaluators from CountsAsOf at its clock; it
// borrows asOf only to record state changes.
type recountStore struct {
	asOf
	st    store.Store
	info  store.ModelInfo
	times []time.Time
	at    time.Time
}

func (s *recountStore) Models(context.Context) ([]store.ModelInfo, error) {
	info := s.info
	info.LatestAt = time.Time{}
	for _, at := range s.times {
		if !at.After(s.at) && at.After(info.LatestAt) {
			info.LatestAt = at
		}
	}
	return []store.ModelInfo{info}, nil
}

func (s *recountStore) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	return s.st.CountsAsOf(ctx, q, s.at)
}
