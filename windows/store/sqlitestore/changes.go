package sqlitestore

import (
	"context"
	"database/sql"

	"github.com/classwatch/classwatch/windows/store"
)

// cellKey and predKey address maintained rows; accumulator sums a call's
// increments per row before writing them.
type (
	cellKey struct {
		model                      int64
		bucket                     int64
		segment, actual, predicted string
	}
	predKey struct {
		model              int64
		bucket             int64
		segment, predicted string
	}
	histKey struct {
		model          int64
		bucket         int64
		segment, class string
		bin            int
	}
	calKey struct {
		model, bucket int64
		segment       string
		bin           int
	}
	modelTotals struct {
		predictions, labeled int64
		latest               sql.NullInt64
	}
)

type accumulator struct {
	names     map[string]int64 // this call's models
	cells     map[cellKey]int64
	predicted map[predKey]int64
	scored    map[predKey]int64 // predictions with scores per count row
	hist      map[histKey]int64
	cal       map[calKey]*store.CalibrationSum
	classes   map[int64][]string // classes of the models with scored predictions
	totals    map[int64]*modelTotals
}

func newAccumulator() *accumulator {
	return &accumulator{
		names:     map[string]int64{},
		cells:     map[cellKey]int64{},
		predicted: map[predKey]int64{},
		scored:    map[predKey]int64{},
		hist:      map[histKey]int64{},
		cal:       map[calKey]*store.CalibrationSum{},
		classes:   map[int64][]string{},
		totals:    map[int64]*modelTotals{},
	}
}

// addScored counts a new prediction's score terms; classes are its
// model's classes.
func (a *accumulator) addScored(model, bucket int64, segment, predicted string, t store.ScoreTerms, classes []string) {
	a.scored[predKey{model, bucket, segment, predicted}]++
	a.classes[model] = classes
	for _, h := range t.Hist {
		a.hist[histKey{model, bucket, segment, h.Class, h.Bin}]++
	}
}

// moveLabel counts a scored prediction's calibration and Brier entry
// moving from label before (had: it had one) to label after.
func (a *accumulator) moveLabel(model, bucket int64, segment, predicted string, t store.ScoreTerms, before string, had bool, after string) {
	k := calKey{model, bucket, segment, t.Bin}
	e := a.cal[k]
	if e == nil {
		e = &store.CalibrationSum{Bucket: fromMicros(bucket), Bin: t.Bin}
		a.cal[k] = e
	}
	if had {
		e.N--
		e.ScoreSum -= t.Pred
		e.Correct -= store.Correct(before, predicted)
		e.Brier -= t.Brier(before)
	}
	e.N++
	e.ScoreSum += t.Pred
	e.Correct += store.Correct(after, predicted)
	e.Brier += t.Brier(after)
}

// model resolves a model name once per call.
func (a *accumulator) model(ctx context.Context, s *Store, tx *ingestTx, name string) (int64, error) {
	if id, ok := a.names[name]; ok {
		return id, nil
	}
	id, err := s.modelID(ctx, tx, name)
	if err != nil {
		return 0, err
	}
	a.names[name] = id
	a.totals[id] = &modelTotals{}
	return id, nil
}

func (a *accumulator) addCell(model, bucket int64, segment, actual, predicted string, n int64) {
	a.cells[cellKey{model, bucket, segment, actual, predicted}] += n
}

func (a *accumulator) addPredicted(model, bucket int64, segment, predicted string, n int64) {
	a.predicted[predKey{model, bucket, segment, predicted}] += n
}

func (a *accumulator) stored(model, at int64) {
	t := a.totals[model]
	t.predictions++
	if !t.latest.Valid || at > t.latest.Int64 {
		t.latest = sql.NullInt64{Int64: at, Valid: true}
	}
}

func (a *accumulator) labeled(model, n int64) { a.totals[model].labeled += n }

// flush writes the summed increments; a net zero writes nothing.
func (a *accumulator) flush(ctx context.Context, tx *ingestTx) error {
	addCell, addPredicted, totals := tx.stmt(ctx, sqlAddCell), tx.stmt(ctx, sqlAddPredicted), tx.stmt(ctx, sqlModelTotals)
	for k, n := range a.cells {
		if n == 0 {
			continue
		}
		if _, err := addCell.ExecContext(ctx, k.model, k.bucket, k.segment, k.actual, k.predicted, n); err != nil {
			return unavailable("update cell", err)
		}
	}
	for k, n := range a.predicted {
		if n == 0 {
			continue
		}
		if _, err := addPredicted.ExecContext(ctx, k.model, k.bucket, k.segment, k.predicted, n, a.scored[k]); err != nil {
			return unavailable("update predicted count", err)
		}
	}
	if err := a.flushScores(ctx, tx); err != nil {
		return err
	}
	for id, t := range a.totals {
		if t.predictions == 0 && t.labeled == 0 {
			continue
		}
		if _, err := totals.ExecContext(ctx, id, t.predictions, t.labeled, t.latest); err != nil {
			return unavailable("update model totals", err)
		}
	}
	return nil
}

// flushScores writes the summed score aggregate increments.
func (a *accumulator) flushScores(ctx context.Context, tx *ingestTx) error {
	if len(a.hist) > 0 {
		add := tx.stmt(ctx, sqlAddScore)
		for k, n := range a.hist {
			if _, err := add.ExecContext(ctx, k.model, k.bucket, k.segment, k.class, k.bin, n); err != nil {
				return unavailable("update score count", err)
			}
		}
	}
	if len(a.cal) > 0 {
		add := tx.stmt(ctx, sqlAddScoreLabel)
		for k, e := range a.cal {
			if e.N == 0 && e.ScoreSum == 0 && e.Correct == 0 && e.Brier == 0 {
				continue
			}
			if _, err := add.ExecContext(ctx, k.model, k.bucket, k.segment, k.bin, e.N, e.ScoreSum, e.Correct, e.Brier); err != nil {
				return unavailable("update calibration entry", err)
			}
		}
	}
	return nil
}

// changes sums the increments over segments into the call's net deltas,
// leaving out the ones that cancelled, ordered by model, bucket and classes.
func (a *accumulator) changes() store.Changes {
	names := make(map[int64]string, len(a.names))
	for name, id := range a.names {
		names[id] = name
	}
	var cs store.ChangeSet
	for k, n := range a.cells {
		cs.AddCell(names[k.model], fromMicros(k.bucket), k.actual, k.predicted, n)
	}
	for k, n := range a.predicted {
		cs.AddPredicted(names[k.model], fromMicros(k.bucket), k.predicted, n)
	}
	for k, n := range a.scored {
		cs.AddScored(names[k.model], fromMicros(k.bucket), a.classes[k.model], n)
	}
	for k, n := range a.hist {
		cs.AddScore(names[k.model], fromMicros(k.bucket), k.class, k.bin, n)
	}
	for k, e := range a.cal {
		cs.AddCalibration(names[k.model], e.Bucket, k.bin, e.N, e.ScoreSum, e.Correct, e.Brier)
	}
	return cs.Changes()
}
