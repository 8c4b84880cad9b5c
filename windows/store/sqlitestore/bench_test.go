package sqlitestore

import (
	"context"
	"path/filepath"
	"strconv"
	"syscall"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// benchBatch is the batch size of the ingest benchmarks, the size the
// collector's batching aims at.
const benchBatch = 1000

// benchSyncModes runs a benchmark under both synchronous settings.
func benchSyncModes(b *testing.B, run func(b *testing.B, s *Store)) {
	for _, mode := range []struct {
		name    string
		relaxed bool
	}{{"sync=FULL", false}, {"sync=NORMAL", true}} {
		b.Run(mode.name, func(b *testing.B) {
			ctx := context.Background()
			s, err := Open(ctx, filepath.Join(b.TempDir(), "bench.db"), Options{RelaxedSync: mode.relaxed})
			if err != nil {
				b.Fatal(err)
			}
			defer s.Close()
			if err := s.Migrate(ctx); err != nil {
				b.Fatal(err)
			}
			if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
				b.Fatal(err)
			}
			run(b, s)
		})
	}
}

// benchPrediction is the i-th prediction of a steady stream: one a
// millisecond, three segments, scores for both classes.
func benchPrediction(i int) store.Prediction {
	t0 := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	at := t0.Add(time.Duration(i) * time.Millisecond)
	p := store.Prediction{
		Model:     "card-fraud",
		ID:        "txn-" + strconv.Itoa(i),
		At:        at,
		Bucket:    at.Truncate(5 * time.Minute),
		Predicted: "legit",
		Segment:   [...]string{"web", "app", "pos"}[i%3],
		Scores:    map[string]float64{"legit": 0.97, "fraud": 0.03},
	}
	if i%50 == 0 {
		p.Predicted, p.Scores = "fraud", map[string]float64{"legit": 0.2, "fraud": 0.8}
	}
	return p
}

func ingestAll(b *testing.B, s *Store, n int) {
	ingestSome(b, s, n, true)
}

// ingestSome stores predictions 0..n-1, with or without their scores.
func ingestSome(b *testing.B, s *Store, n int, scores bool) {
	ctx := context.Background()
	batch := make([]store.Prediction, 0, benchBatch)
	for i := range n {
		p := benchPrediction(i)
		if !scores {
			p.Scores = nil
		}
		batch = append(batch, p)
		if len(batch) == benchBatch || i == n-1 {
			if _, err := s.IngestPredictions(ctx, batch, batch[len(batch)-1].At); err != nil {
				b.Fatal(err)
			}
			batch = batch[:0]
		}
	}
}

// BenchmarkIngestPredictions stores b.N new predictions in batches of
// benchBatch; rows/s is the figure to read.
func BenchmarkIngestPredictions(b *testing.B) {
	benchSyncModes(b, func(b *testing.B, s *Store) {
		b.ResetTimer()
		cpu := processCPU()
		ingestAll(b, s, b.N)
		reportRates(b, cpu)
	})
}

// BenchmarkIngestLabels joins b.N first labels, in batches of benchBatch,
// to b.N predictions stored beforehand (untimed).
func BenchmarkIngestLabels(b *testing.B) {
	benchSyncModes(b, func(b *testing.B, s *Store) {
		ingestAll(b, s, b.N)
		b.ResetTimer()
		cpu := processCPU()
		labelAll(b, s, b.N)
		reportRates(b, cpu)
	})
}

// processCPU returns the CPU time (user and system) the process has used.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// reportRates reports rows per second of wall time and the process's CPU
// time per row since cpu: on a shared machine the second varies far less
// with other jobs' load than the first, so comparisons read both.
func reportRates(b *testing.B, cpu time.Duration) {
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	b.ReportMetric(float64(processCPU()-cpu)/float64(time.Microsecond)/float64(b.N), "cpu-µs/row")
}

// BenchmarkIngestScores measures what the score aggregates cost: the same
// predictions, then first labels for them, stored without and with their
// scores (sync=FULL), each in a fresh store. Read cpu-µs/row of scores=on
// against scores=off of the same run.
func BenchmarkIngestScores(b *testing.B) {
	for _, scores := range []bool{false, true} {
		name := map[bool]string{false: "scores=off", true: "scores=on"}[scores]
		open := func(b *testing.B) *Store {
			ctx := context.Background()
			s, err := Open(ctx, filepath.Join(b.TempDir(), "bench.db"), Options{})
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { s.Close() })
			if err := s.Migrate(ctx); err != nil {
				b.Fatal(err)
			}
			if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
				b.Fatal(err)
			}
			return s
		}
		b.Run(name+"/predictions", func(b *testing.B) {
			s := open(b)
			b.ResetTimer()
			cpu := processCPU()
			ingestSome(b, s, b.N, scores)
			reportRates(b, cpu)
		})
		b.Run(name+"/labels", func(b *testing.B) {
			s := open(b)
			ingestSome(b, s, b.N, scores)
			b.ResetTimer()
			cpu := processCPU()
			labelAll(b, s, b.N)
			reportRates(b, cpu)
		})
	}
}

// labelAll joins first labels to predictions 0..n-1, in batches of
// benchBatch.
func labelAll(b *testing.B, s *Store, n int) {
	ctx := context.Background()
	batch := make([]store.Label, 0, benchBatch)
	t0 := time.Date(2026, 3, 3, 0, 0, 0, 0, time.UTC)
	for i := range n {
		actual := "legit"
		if i%40 == 0 {
			actual = "fraud"
		}
		batch = append(batch, store.Label{Model: "card-fraud", ID: "txn-" + strconv.Itoa(i), Actual: actual, At: t0.Add(time.Duration(i) * time.Millisecond)})
		if len(batch) == benchBatch || i == n-1 {
			if _, err := s.IngestLabels(ctx, batch, t0); err != nil {
				b.Fatal(err)
			}
			batch = batch[:0]
		}
	}
}
