package backtest

import (
	"context"
	"os"
	"runtime"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/alerts/backtest/histgen"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// BenchmarkReplay replays 90 days of one card screen, every prediction
// labeled, with ten rules of every windowed kind evaluated every five
// minutes, from PostgreSQL. CLASSWATCH_BACKTEST_BENCH_N sets the number of
// predictions (default 200,000; the README's figure uses 10,000,000). The
// baseline, in the same run, is reading the same events from the store
// without evaluating anything ("read"); "replay" is the whole backtest.
// Run with -benchtime 1x: setting up stores the history once.
func BenchmarkReplay(b *testing.B) {
	n := 200_000
	if s := os.Getenv("CLASSWATCH_BACKTEST_BENCH_N"); s != "" {
		var err error
		if n, err = strconv.Atoi(s); err != nil {
			b.Fatalf("CLASSWATCH_BACKTEST_BENCH_N: %v", err)
		}
	}
	ctx := context.Background()
	st := pgstoretest.Open(b, pgtest.URL(b))
	if _, err := st.EnsureModel(ctx, "card-screen", histgen.Classes, 0); err != nil {
		b.Fatal(err)
	}
	// 100 days: ten for the longest window to fill, ninety replayed.
	start := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	hours := 100 * 24
	spec := histgen.Spec{
		Model: "card-screen", Start: start, Hours: hours, PerHour: max(1, n/hours),
		Prevalence: 0.02, Recall: 0.9, FalsePositive: 0.01, LabelDelay: 48 * time.Hour,
		LabelLegit: true, Bucket: 5 * time.Minute, Seed: 7,
	}
	began := time.Now()
	sum, err := histgen.Ingest(ctx, st, spec, 20_000)
	if err != nil {
		b.Fatal(err)
	}
	b.Logf("stored %d predictions and %d labels in %s", sum.Predictions, sum.Labels, time.Since(began).Round(time.Second))
	opts := benchOptions(st, start.Add(10*24*time.Hour), start.Add(100*24*time.Hour))

	var events int64
	b.Run("read", func(b *testing.B) {
		for range b.N {
			events = 0
			plans, err := plansOf(opts, &Report{})
			if err != nil {
				b.Fatal(err)
			}
			// What the replay reads: grouped predictions, no scores.
			q := eventQuery(opts, "card-screen", start, 5*time.Minute, plans)
			if err := st.Events(ctx, q, func(*store.Event) error { events++; return nil }); err != nil {
				b.Fatal(err)
			}
		}
		b.ReportMetric(float64(events)*float64(b.N)/b.Elapsed().Seconds(), "events/s")
	})
	b.Run("replay", func(b *testing.B) {
		var peak atomic.Uint64
		stop := sampleHeap(&peak)
		var rep Report
		for range b.N {
			if rep, err = Run(ctx, opts); err != nil {
				b.Fatal(err)
			}
		}
		stop()
		evals := 0
		for _, r := range rep.Rules {
			evals += r.Evaluations
		}
		b.ReportMetric(float64(events)*float64(b.N)/b.Elapsed().Seconds(), "events/s")
		b.ReportMetric(float64(evals), "evaluations")
		b.ReportMetric(float64(peak.Load())/(1<<20), "peak-heap-MiB")
	})
}

// sampleHeap records the largest live heap seen every 20ms until stopped.
func sampleHeap(peak *atomic.Uint64) (stop func()) {
	done := make(chan struct{})
	finished := make(chan struct{})
	go func() {
		defer close(finished)
		var ms runtime.MemStats
		t := time.NewTicker(20 * time.Millisecond)
		defer t.Stop()
		for {
			runtime.ReadMemStats(&ms)
			if ms.HeapAlloc > peak.Load() {
				peak.Store(ms.HeapAlloc)
			}
			select {
			case <-done:
				return
			case <-t.C:
			}
		}
	}()
	return func() { close(done); <-finished }
}

// benchOptions: the daemon's default bucket and three windows, and ten
// rules of the windowed kinds, every five minutes.
func benchOptions(st store.Store, from, to time.Time) Options {
	ws := []windows.Window{
		{Name: "1h", Length: time.Hour},
		{Name: "1d", Length: 24 * time.Hour},
		{Name: "1d-matured", Length: 24 * time.Hour, Lag: 48 * time.Hour},
		{Name: "7d-matured", Length: 7 * 24 * time.Hour, Lag: 72 * time.Hour},
	}
	every := "*/5 * * * *"
	ref := alerts.Reference{Window: "7d-matured"}
	fraud := []string{"fraud"}
	rules := []alerts.Rule{
		{Name: "recall-floor", Kind: alerts.KindFloor, Model: "card-screen", Window: "1d-matured", Metric: "recall", Classes: fraud, Threshold: 0.8},
		{Name: "precision-floor", Kind: alerts.KindFloor, Model: "card-screen", Window: "1d", Metric: "precision", Classes: fraud, Threshold: 0.5},
		{Name: "coverage-floor", Kind: alerts.KindFloor, Model: "card-screen", Window: "1d-matured", Metric: "label_coverage", Threshold: 0.9},
		{Name: "fraud-share-ceiling", Kind: alerts.KindCeiling, Model: "card-screen", Window: "1h", Metric: "predicted_share", Classes: fraud, Threshold: 0.1},
		{Name: "recall-drop", Kind: alerts.KindDrop, Model: "card-screen", Window: "1d-matured", Classes: fraud, Reference: ref},
		{Name: "precision-drop", Kind: alerts.KindDrop, Model: "card-screen", Window: "1d-matured", Metric: "precision", Classes: fraud, Margin: 0.05, Reference: ref},
		{Name: "missed-fraud", Kind: alerts.KindConfusionRise, Model: "card-screen", Window: "1d-matured", Pairs: []alerts.Pair{{Actual: "fraud", Predicted: "legit"}}, Reference: ref},
		{Name: "fraud-mix", Kind: alerts.KindPrevalenceShift, Model: "card-screen", Window: "1d-matured", Reference: ref},
		{Name: "output-mix", Kind: alerts.KindOutputShift, Model: "card-screen", Window: "1d", Reference: ref, PSIThreshold: 0.1},
		{Name: "no-traffic", Kind: alerts.KindNoTraffic, Model: "card-screen", QuietFor: 15 * time.Minute},
	}
	for i := range rules {
		rules[i].Schedule = every
	}
	return Options{
		Store: st, Rules: rules, Windows: ws, From: from, To: to,
		Tracker: windows.TrackerOptions{DefaultBucket: 5 * time.Minute, DefaultWindows: ws},
	}
}
