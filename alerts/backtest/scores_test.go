package backtest

import (
	"cmp"
	"math"
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// scoreHistory is one model's generated predictions and label versions
// by prediction id, for bruteScores.
type scoreHistory struct {
	model    string
	preds    []store.Prediction
	versions map[string][]store.Label
}

func newScoreHistory(h history, model string) *scoreHistory {
	sh := &scoreHistory{model: model, versions: map[string][]store.Label{}}
	for _, p := range h.preds {
		if p.Model == model {
			sh.preds = append(sh.preds, p)
		}
	}
	for _, l := range h.labels {
		if l.Model == model {
			sh.versions[l.ID] = append(sh.versions[l.ID], l)
		}
	}
	return sh
}

// bruteScores computes the score aggregates of the model's buckets in
// [from, to) as known at at, straight from the generated history and the
// definitions in README.md "Early warning": each prediction made by at
// that carries scores counts each class's score in its bin (a missing
// score is 0); under its label as of at (the latest version known by at,
// else the default legit once the 36-hour timeout has passed for a screen
// prediction never labeled) it adds to the calibration bin of its
// predicted class's score and to the Brier sum Σ_k (s_k − 1[actual = k])².
// Sums are plain float sums, not the stores' rounded ones.
func (sh *scoreHistory) bruteScores(classes []string, from, to, at time.Time) store.Counts {
	type histKey struct {
		bucket int64
		class  string
		bin    int
	}
	type calKey struct {
		bucket int64
		bin    int
	}
	hist := map[histKey]int64{}
	cal := map[calKey]*store.CalibrationCount{}
	brier := map[int64]*store.BrierSum{}
	for _, p := range sh.preds {
		if len(p.Scores) == 0 || p.At.After(at) || p.Bucket.Before(from) || !p.Bucket.Before(to) {
			continue
		}
		b := p.Bucket.UnixNano()
		for _, c := range classes {
			hist[histKey{b, c, store.ScoreBin(p.Scores[c])}]++
		}
		actual, ok := labelAsOf(sh.versions[p.ID], at)
		if !ok && len(sh.versions[p.ID]) == 0 && sh.model == screen && !p.At.Add(36*time.Hour).After(at) {
			actual, ok = "legit", true
		}
		if !ok {
			continue
		}
		s := p.Scores[p.Predicted]
		k := calKey{b, store.ScoreBin(s)}
		if cal[k] == nil {
			cal[k] = &store.CalibrationCount{Bucket: p.Bucket, Bin: k.bin}
		}
		cal[k].N++
		cal[k].ScoreSum += s
		if actual == p.Predicted {
			cal[k].Correct++
		}
		if brier[b] == nil {
			brier[b] = &store.BrierSum{Bucket: p.Bucket}
		}
		brier[b].N++
		for _, c := range classes {
			d := p.Scores[c]
			if c == actual {
				d--
			}
			brier[b].Sum += d * d
		}
	}
	var out store.Counts
	for k, n := range hist {
		out.Scores = append(out.Scores, store.ScoreCount{Bucket: time.Unix(0, k.bucket).UTC(), Class: k.class, Bin: k.bin, N: n})
	}
	for _, c := range cal {
		out.Calibration = append(out.Calibration, *c)
	}
	for _, s := range brier {
		out.Brier = append(out.Brier, *s)
	}
	sortScoreCounts(&out)
	return out
}

// labelAsOf returns the label in force at at: the version with the
// greatest (at, actual) among those known by then.
func labelAsOf(vs []store.Label, at time.Time) (string, bool) {
	var cur *store.Label
	for i, v := range vs {
		if v.At.After(at) {
			continue
		}
		if cur == nil || v.At.After(cur.At) || (v.At.Equal(cur.At) && v.Actual > cur.Actual) {
			cur = &vs[i]
		}
	}
	if cur == nil {
		return "", false
	}
	return cur.Actual, true
}

func sortScoreCounts(c *store.Counts) {
	slices.SortFunc(c.Scores, func(x, y store.ScoreCount) int {
		return cmp.Or(x.Bucket.Compare(y.Bucket), cmp.Compare(x.Class, y.Class), cmp.Compare(x.Bin, y.Bin))
	})
	slices.SortFunc(c.Calibration, func(x, y store.CalibrationCount) int {
		return cmp.Or(x.Bucket.Compare(y.Bucket), cmp.Compare(x.Bin, y.Bin))
	})
	slices.SortFunc(c.Brier, func(x, y store.BrierSum) int { return x.Bucket.Compare(y.Bucket) })
}

// diffScores reports the first difference of got's score aggregates from
// want's: counts exactly, float sums within 1e-9 per prediction (the stores
// round each prediction's term to 1e-9 units).
func diffScores(t *testing.T, what string, got, want store.Counts) {
	t.Helper()
	sortScoreCounts(&got)
	if i, ok := firstDiff(got.Scores, want.Scores, func(x, y store.ScoreCount) bool { return x == y }); !ok {
		t.Errorf("%s: score histogram differs at %d: got %v, want %v", what, i, entry(got.Scores, i), entry(want.Scores, i))
	}
	near := func(x, y float64, n int64) bool { return math.Abs(x-y) <= 1e-9*float64(n+1) }
	if i, ok := firstDiff(got.Calibration, want.Calibration, func(x, y store.CalibrationCount) bool {
		return x.Bucket.Equal(y.Bucket) && x.Bin == y.Bin && x.N == y.N && x.Correct == y.Correct && near(x.ScoreSum, y.ScoreSum, y.N)
	}); !ok {
		t.Errorf("%s: calibration differs at %d: got %v, want %v", what, i, entry(got.Calibration, i), entry(want.Calibration, i))
	}
	if i, ok := firstDiff(got.Brier, want.Brier, func(x, y store.BrierSum) bool {
		return x.Bucket.Equal(y.Bucket) && x.N == y.N && near(x.Sum, y.Sum, y.N)
	}); !ok {
		t.Errorf("%s: Brier sums differ at %d: got %v, want %v", what, i, entry(got.Brier, i), entry(want.Brier, i))
	}
}

// firstDiff returns the index of the first entry where a and b differ.
func firstDiff[T any](a, b []T, eq func(x, y T) bool) (int, bool) {
	for i := range min(len(a), len(b)) {
		if !eq(a[i], b[i]) {
			return i, false
		}
	}
	return min(len(a), len(b)), len(a) == len(b)
}

// entry returns s[i], or nil past its end.
func entry[T any](s []T, i int) any {
	if i < len(s) {
		return s[i]
	}
	return nil
}

// TestScoreAggregatesAsOf feeds the store's events up to several times
// into the sweep's as-of state and compares its score aggregates with the
// brute-force computation from the generated history and with the
// store's own as-of read.
func TestScoreAggregatesAsOf(t *testing.T) {
	h := generate(1)
	st := openStore(t, h)
	ctx := t.Context()
	infos, err := st.Models(ctx)
	if err != nil {
		t.Fatal(err)
	}
	i := slices.IndexFunc(infos, func(m store.ModelInfo) bool { return m.Name == screen })
	info := infos[i]
	q := store.Query{Model: screen, From: day(0), To: day(9)}
	sh := newScoreHistory(h, screen)
	for _, at := range []time.Time{day(0.5), day(2.3), day(4.5), day(6.7), day(9)} {
		as := newAsOf(info, bucket, day(0))
		err := st.Events(ctx, store.EventQuery{Model: screen, From: q.From, To: q.To, Until: day(10), Scores: true}, func(e *store.Event) error {
			if !e.At.After(at) {
				as.apply(e)
			}
			return nil
		})
		if err != nil {
			t.Fatalf("read events: %v", err)
		}
		got, err := as.Counts(ctx, q)
		if err != nil {
			t.Fatal(err)
		}
		want := sh.bruteScores(info.Classes, q.From, q.To, at)
		if len(want.Calibration) == 0 || len(want.Scores) == 0 {
			t.Fatalf("as of %s: the history has no scored predictions to compare", at)
		}
		diffScores(t, "sweep as of "+at.Format(time.RFC3339), got, want)
		recounted, err := st.CountsAsOf(ctx, q, at)
		if err != nil {
			t.Fatalf("read counts as of: %v", err)
		}
		diffScores(t, "CountsAsOf as of "+at.Format(time.RFC3339), recounted, want)
		// Both keep the stores' 1e-9 units: the sums agree exactly.
		if !slices.Equal(got.Calibration, recounted.Calibration) || !slices.Equal(got.Brier, recounted.Brier) {
			t.Errorf("as of %s: the sweep's calibration and Brier sums are not exactly the store's", at.Format(time.RFC3339))
		}
	}
}
