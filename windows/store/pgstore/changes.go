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
	histKey struct {
		model          int32
		bucket         int64
		segment, class string
		bin            int
	}
	calKey struct {
		model   int32
		bucket  int64
		segment string
		bin     int
	}
)

// tally sums a transaction's count increments per row, so each row is
// written once, and turns them into the call's store.Changes.
type tally struct {
	cells     map[cellKey]int64
	predicted map[predKey]int64
	scored    map[predKey]int64     // predictions with scores per count row
	latest    map[predKey]time.Time // greatest prediction time per count row
	hist      map[histKey]int64
	cal       map[calKey]*store.CalibrationSum
	classes   map[int32][]string // the classes of models with scored predictions
}

func newTally() *tally {
	return &tally{cells: map[cellKey]int64{}, predicted: map[predKey]int64{}, scored: map[predKey]int64{},
		latest: map[predKey]time.Time{}, hist: map[histKey]int64{}, cal: map[calKey]*store.CalibrationSum{},
		classes: map[int32][]string{}}
}

// addScored counts a new prediction's score terms.
func (t *tally) addScored(model int32, bucket time.Time, segment, predicted string, st store.ScoreTerms) {
	b := bucket.UnixMicro()
	t.scored[predKey{model, b, segment, predicted}]++
	for _, h := range st.Hist {
		t.hist[histKey{model, b, segment, h.Class, h.Bin}]++
	}
}

// addCal adds n labeled predictions to a calibration entry (negative
// values take them away); sums are in 1e-9 units.
func (t *tally) addCal(model int32, bucket time.Time, segment string, bin int, n, scoreSum, correct, brier int64) {
	k := calKey{model, bucket.UnixMicro(), segment, bin}
	e := t.cal[k]
	if e == nil {
		e = &store.CalibrationSum{Bucket: bucket.UTC(), Bin: bin}
		t.cal[k] = e
	}
	e.N += n
	e.ScoreSum += scoreSum
	e.Correct += correct
	e.Brier += brier
}

// moveLabel counts a scored prediction's calibration and Brier entry
// moving from label before (had: it had one) to label after.
func (t *tally) moveLabel(model int32, bucket time.Time, segment, predicted string, st store.ScoreTerms, before string, had bool, after string) {
	if had {
		t.addCal(model, bucket, segment, st.Bin, -1, -st.Pred, -store.Correct(before, predicted), -st.Brier(before))
	}
	t.addCal(model, bucket, segment, st.Bin, 1, st.Pred, store.Correct(after, predicted), st.Brier(after))
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
			ns, scored        []int64
		)
		for _, k := range keys {
			models = append(models, k.model)
			buckets = append(buckets, time.UnixMicro(k.bucket).UTC())
			segments = append(segments, k.segment)
			classes = append(classes, k.predicted)
			ns = append(ns, t.predicted[k])
			scored = append(scored, t.scored[k])
			latest = append(latest, t.latest[k])
		}
		b.Queue(sqlAddPredicted, models, buckets, segments, classes, ns, latest, scored)
	}
	t.queueScores(b)
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

// queueScores adds the upserts of the score aggregates to b, in key order.
func (t *tally) queueScores(b *pgx.Batch) {
	if len(t.hist) > 0 {
		keys := make([]histKey, 0, len(t.hist))
		for k := range t.hist {
			keys = append(keys, k)
		}
		slices.SortFunc(keys, func(x, y histKey) int {
			return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.bucket, y.bucket), strings.Compare(x.segment, y.segment),
				strings.Compare(x.class, y.class), cmp.Compare(x.bin, y.bin))
		})
		var (
			models            []int32
			buckets           []time.Time
			segments, classes []string
			bins              []int16
			ns                []int64
		)
		for _, k := range keys {
			models, buckets = append(models, k.model), append(buckets, time.UnixMicro(k.bucket).UTC())
			segments, classes = append(segments, k.segment), append(classes, k.class)
			bins, ns = append(bins, int16(k.bin)), append(ns, t.hist[k])
		}
		b.Queue(sqlAddScores, models, buckets, segments, classes, bins, ns)
	}
	keys := make([]calKey, 0, len(t.cal))
	for k, e := range t.cal {
		if e.N != 0 || e.ScoreSum != 0 || e.Correct != 0 || e.Brier != 0 {
			keys = append(keys, k)
		}
	}
	if len(keys) == 0 {
		return
	}
	slices.SortFunc(keys, func(x, y calKey) int {
		return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.bucket, y.bucket), strings.Compare(x.segment, y.segment), cmp.Compare(x.bin, y.bin))
	})
	var (
		models                    []int32
		buckets                   []time.Time
		segments                  []string
		bins                      []int16
		ns, sums, corrects, brier []int64
	)
	for _, k := range keys {
		e := t.cal[k]
		models, buckets, segments, bins = append(models, k.model), append(buckets, e.Bucket), append(segments, k.segment), append(bins, int16(k.bin))
		ns, sums, corrects, brier = append(ns, e.N), append(sums, e.ScoreSum), append(corrects, e.Correct), append(brier, e.Brier)
	}
	b.Queue(sqlAddScoreLabels, models, buckets, segments, bins, ns, sums, corrects, brier)
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
	for k, n := range t.scored {
		cs.AddScored(names[k.model], time.UnixMicro(k.bucket), t.classes[k.model], n)
	}
	for k, n := range t.hist {
		cs.AddScore(names[k.model], time.UnixMicro(k.bucket), k.class, k.bin, n)
	}
	for k, e := range t.cal {
		cs.AddCalibration(names[k.model], e.Bucket, k.bin, e.N, e.ScoreSum, e.Correct, e.Brier)
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
