package pgstore

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// scoresIn reads the maintained score aggregates of a count read's
// arguments (model id, from, to, segment) into out.
func scoresIn(ctx context.Context, tx querier, out *store.Counts, args ...any) error {
	classes, err := queryClasses(ctx, tx, args[0].(int32))
	if err != nil {
		return err
	}
	scored := map[time.Time]int64{}
	rows, err := tx.Query(ctx, sqlScored, args...)
	if err != nil {
		return err
	}
	var (
		b time.Time
		n int64
	)
	if _, err := pgx.ForEachRow(rows, []any{&b, &n}, func() error { scored[b] = n; return nil }); err != nil {
		return err
	}
	var (
		hist []store.ScoreCount
		h    store.ScoreCount
	)
	rows, err = tx.Query(ctx, sqlScoreCounts, args...)
	if err != nil {
		return err
	}
	if _, err := pgx.ForEachRow(rows, []any{&h.Bucket, &h.Class, &h.Bin, &h.N}, func() error { hist = append(hist, h); return nil }); err != nil {
		return err
	}
	var (
		sums []store.CalibrationSum
		c    store.CalibrationSum
	)
	rows, err = tx.Query(ctx, sqlScoreLabels, args...)
	if err != nil {
		return err
	}
	if _, err := pgx.ForEachRow(rows, []any{&c.Bucket, &c.Bin, &c.N, &c.ScoreSum, &c.Correct, &c.Brier}, func() error {
		sums = append(sums, c)
		return nil
	}); err != nil {
		return err
	}
	out.Scores = store.ScoreHistogram(scored, hist, classes)
	out.Calibration, out.Brier = store.Calibration(sums)
	return nil
}

// scoresAsOf recomputes the score aggregates of a count read's arguments
// (model id, from, to, segment, asOf) from the raw rows.
func scoresAsOf(ctx context.Context, tx querier, out *store.Counts, args ...any) error {
	classes, err := queryClasses(ctx, tx, args[0].(int32))
	if err != nil {
		return err
	}
	rows, err := tx.Query(ctx, sqlScoresAsOf, args...)
	if err != nil {
		return err
	}
	r := store.NewScoreRecount()
	var (
		bucket    time.Time
		predicted string
		raw       []byte
		actual    *string
	)
	if _, err := pgx.ForEachRow(rows, []any{&bucket, &predicted, &raw, &actual}, func() error {
		return addRaw(r, "", bucket, predicted, raw, actual)
	}); err != nil {
		return err
	}
	out.Scores, out.Calibration, out.Brier = r.Counts("", classes)
	return nil
}

// addRaw adds one raw prediction's stored scores to r.
func addRaw(r *store.ScoreRecount, group string, bucket time.Time, predicted string, raw []byte, actual *string) error {
	scores, err := store.ParseScores(raw)
	if err != nil {
		return fmt.Errorf("decode stored scores: %w", err)
	}
	if actual == nil {
		r.Add(group, bucket, predicted, scores, "", false)
	} else {
		r.Add(group, bucket, predicted, scores, *actual, true)
	}
	return nil
}

// queryClasses returns a model's classes in registration order.
func queryClasses(ctx context.Context, tx querier, id int32) ([]string, error) {
	rows, err := tx.Query(ctx, sqlClasses, id)
	if err != nil {
		return nil, err
	}
	return pgx.CollectRows(rows, pgx.RowTo[string])
}

// verifyScores recomputes the score aggregates of every kept bucket from
// the raw rows and returns where the maintained ones differ.
func verifyScores(ctx context.Context, tx querier) ([]store.Difference, error) {
	re, st := store.NewScoreRecount(), store.NewScoreRecount()
	var (
		model, segment, predicted, class string
		bucket                           time.Time
		raw                              []byte
		actual                           *string
		bin                              int
		n                                int64
		c                                store.CalibrationSum
	)
	steps := []struct {
		sql  string
		dest []any
		add  func() error
	}{
		{sqlVerifyScoresRaw, []any{&model, &segment, &bucket, &predicted, &raw, &actual}, func() error {
			return addRaw(re, store.VerifyGroup(model, segment), bucket, predicted, raw, actual)
		}},
		{sqlVerifyScored, []any{&model, &segment, &bucket, &n}, func() error {
			st.Scored[store.RecountKey{Group: store.VerifyGroup(model, segment), Bucket: bucket.UnixMicro()}] += n
			return nil
		}},
		{sqlVerifyScoreCounts, []any{&model, &segment, &bucket, &class, &bin, &n}, func() error {
			if n != 0 {
				st.Hist[store.RecountKey{Group: store.VerifyGroup(model, segment), Bucket: bucket.UnixMicro(), Class: class, Bin: bin}] += n
			}
			return nil
		}},
		{sqlVerifyScoreLabels, []any{&model, &segment, &bucket, &bin, &c.N, &c.ScoreSum, &c.Correct, &c.Brier}, func() error {
			st.AddCal(store.RecountKey{Group: store.VerifyGroup(model, segment), Bucket: bucket.UnixMicro(), Bin: bin}, c.N, c.ScoreSum, c.Correct, c.Brier)
			return nil
		}},
	}
	for _, step := range steps {
		rows, err := tx.Query(ctx, step.sql)
		if err != nil {
			return nil, err
		}
		if _, err := pgx.ForEachRow(rows, step.dest, step.add); err != nil {
			return nil, err
		}
	}
	return re.Differences(st), nil
}
