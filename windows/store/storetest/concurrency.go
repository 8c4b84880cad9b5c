package storetest

import (
	"fmt"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// testConcurrentLabels races label batches that all label the same
// predictions: each worker sends batches holding a version for every id,
// drawn from a few classes and times, so batches add first labels,
// duplicates and corrections to the same predictions at once. However the
// batches interleave, each prediction is matched exactly once, the
// committed Changes of all calls add up to the final cells, and the final
// cells are those of the order-independent current label (the reference).
func testConcurrentLabels(t *testing.T, s store.Store) {
	ensure(t, s, ticketModel, classesOf(ticketModel)...)
	const ids, workers, rounds = 40, 4, 6
	var preds []store.Prediction
	rng := rand.New(rand.NewPCG(11, 3))
	for i := range ids {
		preds = append(preds, randomPrediction(rng, ticketModel, fmt.Sprintf("t%02d", i), base(), 15*time.Minute))
	}
	ingestPredictions(t, s, at(time.Hour), preds...)
	ref := newReference()
	ref.predictions(preds)
	plans := make([][][]store.Label, workers)
	for w := range plans {
		for range rounds {
			var ls []store.Label
			for _, p := range preds {
				// Few distinct times and classes, so versions repeat
				// across workers.
				when := at(time.Duration(1+rng.IntN(3)) * time.Hour)
				ls = append(ls, lab(ticketModel, p.ID, classesOf(ticketModel)[rng.IntN(3)], when))
			}
			plans[w] = append(plans[w], ls)
			ref.labels(ls, at(5*time.Hour))
		}
	}
	var (
		mu      sync.Mutex
		matched int
		sum     = map[changeCell]int64{}
		wg      sync.WaitGroup
	)
	for w, plan := range plans {
		wg.Go(func() {
			for _, ls := range plan {
				res, err := s.IngestLabels(t.Context(), ls, at(5*time.Hour))
				if err != nil {
					t.Errorf("worker %d: IngestLabels: %v", w, err)
					return
				}
				mu.Lock()
				for _, o := range res.Outcomes {
					if o == store.LabelMatched {
						matched++
					}
				}
				for _, c := range res.Changes.Cells {
					sum[changeCell{c.Model, c.Bucket.UnixMicro(), c.Actual, c.Predicted}] += c.N
				}
				mu.Unlock()
			}
		})
	}
	wg.Wait()
	if matched != ids {
		t.Errorf("%d lines matched, want %d (one per prediction)", matched, ids)
	}
	q := all(ticketModel)
	want := ref.counts(q, nil)
	wantCounts(t, "Counts", counts(t, s, q), want)
	wantSum := map[changeCell]int64{}
	for _, c := range want.Cells {
		wantSum[changeCell{ticketModel, c.Bucket.UnixMicro(), c.Actual, c.Predicted}] = c.N
	}
	for k, n := range sum {
		if n == 0 {
			delete(sum, k)
		}
	}
	if fmt.Sprint(sum) != fmt.Sprint(wantSum) {
		t.Errorf("summed Changes %v, want the final cells %v", sum, wantSum)
	}
	wantVerifyClean(t, s)
}
