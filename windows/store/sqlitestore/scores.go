package sqlitestore

import (
	"context"
	"database/sql"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// scoresIn reads the maintained score aggregates of a count read's
// arguments (model id, from, to, segment) into out.
func scoresIn(ctx context.Context, q queryer, out *store.Counts, args []any) error {
	classes, err := classesOf(ctx, q, args[0].(int64))
	if err != nil {
		return err
	}
	scored := map[time.Time]int64{}
	err = each(ctx, q, sqlScored, args, func(r *sql.Rows) error {
		var b, n int64
		err := r.Scan(&b, &n)
		scored[fromMicros(b)] = n
		return err
	})
	if err != nil {
		return unavailable("read scored counts", err)
	}
	var hist []store.ScoreCount
	err = each(ctx, q, sqlScoreCounts, args, func(r *sql.Rows) error {
		var (
			h store.ScoreCount
			b int64
		)
		err := r.Scan(&b, &h.Class, &h.Bin, &h.N)
		h.Bucket = fromMicros(b)
		hist = append(hist, h)
		return err
	})
	if err != nil {
		return unavailable("read score counts", err)
	}
	var sums []store.CalibrationSum
	err = each(ctx, q, sqlScoreLabels, args, func(r *sql.Rows) error {
		var (
			c store.CalibrationSum
			b int64
		)
		err := r.Scan(&b, &c.Bin, &c.N, &c.ScoreSum, &c.Correct, &c.Brier)
		c.Bucket = fromMicros(b)
		sums = append(sums, c)
		return err
	})
	if err != nil {
		return unavailable("read calibration entries", err)
	}
	out.Scores = store.ScoreHistogram(scored, hist, classes)
	out.Calibration, out.Brier = store.Calibration(sums)
	return nil
}

// scoresAsOf recomputes the score aggregates of a count read's arguments
// (model id, from, to, segment, asOf) from the raw rows.
func scoresAsOf(ctx context.Context, q queryer, out *store.Counts, args []any) error {
	classes, err := classesOf(ctx, q, args[0].(int64))
	if err != nil {
		return err
	}
	re := store.NewScoreRecount()
	err = each(ctx, q, sqlScoresAsOf, args, func(r *sql.Rows) error {
		var (
			bucket            int64
			predicted, scores string
			actual            sql.NullString
		)
		if err := r.Scan(&bucket, &predicted, &scores, &actual); err != nil {
			return err
		}
		return addRaw(re, "", bucket, predicted, scores, actual)
	})
	if err != nil {
		return unavailable("recount scores", err)
	}
	out.Scores, out.Calibration, out.Brier = re.Counts("", classes)
	return nil
}

// addRaw adds one raw prediction's stored scores to r.
func addRaw(r *store.ScoreRecount, group string, bucket int64, predicted, raw string, actual sql.NullString) error {
	scores, err := store.ParseScores([]byte(raw))
	if err != nil {
		return fmt.Errorf("decode stored scores: %w", err)
	}
	r.Add(group, fromMicros(bucket), predicted, scores, actual.String, actual.Valid)
	return nil
}

// verifyScores recomputes the score aggregates of every kept bucket from
// the raw rows and returns where the maintained ones differ.
func verifyScores(ctx context.Context, q queryer) ([]store.Difference, error) {
	re, st := store.NewScoreRecount(), store.NewScoreRecount()
	var (
		model, segment, predicted, class, scores string
		bucket, n                                int64
		bin                                      int
		actual                                   sql.NullString
		c                                        store.CalibrationSum
	)
	key := func() store.RecountKey {
		return store.RecountKey{Group: store.VerifyGroup(model, segment), Bucket: bucket, Class: class, Bin: bin}
	}
	steps := []struct {
		query string
		dest  []any
		add   func() error
	}{
		{sqlVerifyScoresRaw, []any{&model, &segment, &bucket, &predicted, &scores, &actual}, func() error {
			return addRaw(re, store.VerifyGroup(model, segment), bucket, predicted, scores, actual)
		}},
		{sqlVerifyScored, []any{&model, &segment, &bucket, &n}, func() error {
			class, bin = "", 0
			st.Scored[key()] += n
			return nil
		}},
		{sqlVerifyScoreCounts, []any{&model, &segment, &bucket, &class, &bin, &n}, func() error {
			if n != 0 {
				st.Hist[key()] += n
			}
			return nil
		}},
		{sqlVerifyScoreLabels, []any{&model, &segment, &bucket, &bin, &c.N, &c.ScoreSum, &c.Correct, &c.Brier}, func() error {
			class = ""
			st.AddCal(key(), c.N, c.ScoreSum, c.Correct, c.Brier)
			return nil
		}},
	}
	for _, step := range steps {
		err := each(ctx, q, step.query, nil, func(r *sql.Rows) error {
			if err := r.Scan(step.dest...); err != nil {
				return err
			}
			return step.add()
		})
		if err != nil {
			return nil, unavailable("verify score aggregates", err)
		}
	}
	return re.Differences(st), nil
}
