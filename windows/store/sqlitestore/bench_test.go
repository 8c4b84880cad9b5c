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
	ctx := context.Background()
	batch := make([]store.Prediction, 0, benchBatch)
	for i := range n {
		batch = append(batch, benchPrediction(i))
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
		ctx := context.Background()
		ingestAll(b, s, b.N)
		batch := make([]store.Label, 0, benchBatch)
		t0 := time.Date(2026, 3, 3, 0, 0, 0, 0, time.UTC)
		b.ResetTimer()
		cpu := processCPU()
		for i := range b.N {
			actual := "legit"
			if i%40 == 0 {
				actual = "fraud"
			}
			batch = append(batch, store.Label{Model: "card-fraud", ID: "txn-" + strconv.Itoa(i), Actual: actual, At: t0.Add(time.Duration(i) * time.Millisecond)})
			if len(batch) == benchBatch || i == b.N-1 {
				if _, err := s.IngestLabels(ctx, batch, t0); err != nil {
					b.Fatal(err)
				}
				batch = batch[:0]
			}
		}
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
