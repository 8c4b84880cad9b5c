package sqlitestore

import (
	"context"
	"path/filepath"
	"strconv"
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
		ingestAll(b, s, b.N)
		b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "rows/s")
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
		b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	})
}
