package pgstore

import (
	"cmp"
	"context"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// cellKey and predKey address maintained rows (per segment).
type (
	cellKey struct {
		model                      int32
		bucket                     int64 // Unix microseconds
		segment, actual, predicted string
	}
	predKey struct {
		model              int32
		bucket             int64
		segment, predicted string
	}
)

// tally sums a transaction's count increments per row, so each row is
// written once, and turns them into the call's store.Changes.
type tally struct {
	cells     map[cellKey]int64
	predicted map[predKey]int64
	latest    map[predKey]time.Time // greatest prediction time per count row
}

func newTally() *tally {
	return &tally{cells: map[cellKey]int64{}, predicted: map[predKey]int64{}, latest: map[predKey]time.Time{}}
}

func (t *tally) addCell(model int32, bucket time.Time, segment, actual, predicted string, n int64) {
	t.cells[cellKey{model, bucket.UnixMicro(), segment, actual, predicted}] += n
}

func (t *tally) addPredicted(model int32, bucket time.Time, segment, predicted string, at time.Time) {
	k := predKey{model, bucket.UnixMicro(), segment, predicted}
	t.predicted[k]++
	if at.After(t.latest[k]) || t.latest[k].IsZero() {
		t.latest[k] = at
	}
}

// queue adds the upserts of the summed increments to b, in key order: every
// transaction locks count rows in the same order, so two batches touching
// the same rows wait for each other instead of deadlocking.
func (t *tally) queue(b *pgx.Batch) {
	if len(t.predicted) > 0 {
		keys := make([]predKey, 0, len(t.predicted))
		for k := range t.predicted {
			keys = append(keys, k)
		}
		slices.SortFunc(keys, comparePredKey)
		var (
			models            []int32
			buckets, latest   []time.Time
			segments, classes []string
			ns                []int64
		)
		for _, k := range keys {
			models = append(models, k.model)
			buckets = append(buckets, time.UnixMicro(k.bucket).UTC())
			segments = append(segments, k.segment)
			classes = append(classes, k.predicted)
			ns = append(ns, t.predicted[k])
			latest = append(latest, t.latest[k])
		}
		b.Queue(sqlAddPredicted, models, buckets, segments, classes, ns, latest)
	}
	keys := make([]cellKey, 0, len(t.cells))
	for k, n := range t.cells {
		if n != 0 {
			keys = append(keys, k)
		}
	}
	if len(keys) == 0 {
		return
	}
	slices.SortFunc(keys, compareCellKey)
	var (
		models                        []int32
		buckets                       []time.Time
		segments, actuals, predicteds []string
		ns                            []int64
	)
	for _, k := range keys {
		models = append(models, k.model)
		buckets = append(buckets, time.UnixMicro(k.bucket).UTC())
		segments = append(segments, k.segment)
		actuals = append(actuals, k.actual)
		predicteds = append(predicteds, k.predicted)
		ns = append(ns, t.cells[k])
	}
	b.Queue(sqlAddCells, models, buckets, segments, actuals, predicteds, ns)
}

// write sends the upserts in one round trip.
func (t *tally) write(ctx context.Context, tx conn) error {
	var b pgx.Batch
	t.queue(&b)
	if b.Len() == 0 {
		return nil
	}
	return tx.SendBatch(ctx, &b).Close()
}

// changes sums the increments over segments into net deltas, leaving out
// those that cancelled, ordered by model, bucket and class names.
func (t *tally) changes(names map[int32]string) store.Changes {
	var cs store.ChangeSet
	for k, n := range t.cells {
		cs.AddCell(names[k.model], time.UnixMicro(k.bucket), k.actual, k.predicted, n)
	}
	for k, n := range t.predicted {
		cs.AddPredicted(names[k.model], time.UnixMicro(k.bucket), k.predicted, n)
	}
	return cs.Changes()
}

func comparePredKey(x, y predKey) int {
	return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.bucket, y.bucket),
		strings.Compare(x.segment, y.segment), strings.Compare(x.predicted, y.predicted))
}

func compareCellKey(x, y cellKey) int {
	return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.bucket, y.bucket),
		strings.Compare(x.segment, y.segment), strings.Compare(x.actual, y.actual), strings.Compare(x.predicted, y.predicted))
}

// namesOf inverts a name → id map.
func namesOf(ids map[string]int32) map[int32]string {
	out := make(map[int32]string, len(ids))
	for n, id := range ids {
		out[id] = n
	}
	return out
}
