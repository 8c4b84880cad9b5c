package backtest

import (
	"cmp"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// scoreAgg is one bucket's score aggregates as the stores keep them
// (README.md "Early warning"), as of the replay clock: how many
// predictions carry scores, the counts of the score bins above 0 per
// class (every class's bin 0 is the scored predictions less those), and
// per bin of the predicted class's score the labeled predictions'
// calibration and Brier sums. The terms come from store.NewScoreTerms and
// the sums are kept as the stores keep them, in 1e-9 units, so a
// correction takes away exactly what the earlier label added and the
// sweep's sums equal the store's as-of read.
type scoreAgg struct {
	scored int64
	above  map[classBin]int64
	cal    [store.ScoreBins]calSum
}

type classBin struct {
	class string
	bin   int
}

// calSum is one calibration bin: n labeled predictions, the sum of their
// predicted class's score and of their Brier terms (1e-9 units), and how
// many have label == predicted.
type calSum struct{ n, sum, correct, brier int64 }

// applyScores adds a scored event's effect on its bucket's score
// aggregates: a prediction counts each class's score in its bin, a label
// change moves the prediction's calibration and Brier entry from the old
// label to the new one. Events without scores count nowhere.
func (a *asOf) applyScores(e *store.Event) {
	if len(e.Scores) == 0 {
		return
	}
	b := e.Bucket.UnixNano()
	agg := a.scores[b]
	if agg == nil {
		agg = &scoreAgg{above: map[classBin]int64{}}
		a.scores[b] = agg
	}
	if e.Kind == store.EventPrediction {
		agg.scored++
		for c, s := range e.Scores {
			if bin := store.ScoreBin(s); bin > 0 {
				agg.above[classBin{c, bin}]++
			}
		}
		return
	}
	st, _ := store.NewScoreTerms(e.Scores, e.Predicted)
	c := &agg.cal[st.Bin]
	if e.Old != "" {
		c.n, c.sum, c.correct, c.brier = c.n-1, c.sum-st.Pred, c.correct-store.Correct(e.Old, e.Predicted), c.brier-st.Brier(e.Old)
	}
	c.n, c.sum, c.correct, c.brier = c.n+1, c.sum+st.Pred, c.correct+store.Correct(e.Actual, e.Predicted), c.brier+st.Brier(e.Actual)
}

// addScoreCounts appends bucket b's score aggregates to out as the stores
// answer Counts: histogram counts by class name then bin (bin 0 for every
// class of the model and every class with a count above it), calibration
// by bin, one Brier sum; zero counts left out.
func (a *asOf) addScoreCounts(out *store.Counts, b int64) {
	agg, ok := a.scores[b]
	if !ok {
		return
	}
	at := time.Unix(0, b).UTC()
	above := map[string]int64{}
	names := slices.Clone(a.info.Classes)
	for cb, n := range agg.above {
		above[cb.class] += n
		names = append(names, cb.class)
	}
	slices.Sort(names)
	var hist []store.ScoreCount
	for _, c := range slices.Compact(names) {
		if n := agg.scored - above[c]; n != 0 {
			hist = append(hist, store.ScoreCount{Bucket: at, Class: c, Bin: 0, N: n})
		}
	}
	for cb, n := range agg.above {
		if n != 0 {
			hist = append(hist, store.ScoreCount{Bucket: at, Class: cb.class, Bin: cb.bin, N: n})
		}
	}
	slices.SortFunc(hist, func(x, y store.ScoreCount) int {
		return cmp.Or(cmp.Compare(x.Class, y.Class), cmp.Compare(x.Bin, y.Bin))
	})
	out.Scores = append(out.Scores, hist...)
	brier := store.BrierSum{Bucket: at}
	var brierNano int64
	for bin, c := range agg.cal {
		if c == (calSum{}) {
			continue
		}
		out.Calibration = append(out.Calibration, store.CalibrationCount{Bucket: at, Bin: bin, N: c.n, ScoreSum: store.FromNano(c.sum), Correct: c.correct})
		brier.N += c.n
		brierNano += c.brier
	}
	if brier.N != 0 || brierNano != 0 {
		brier.Sum = store.FromNano(brierNano)
		out.Brier = append(out.Brier, brier)
	}
}

// addScoreChanges adds a scored event's score changes to ch, for the
// rolling windows: a prediction adds one count per class of the model (and
// per class it scores above bin 0) in the bin of its score, a label change
// moves its calibration and Brier entry. classes are the model's classes
// as of the event.
func addScoreChanges(ch *store.Changes, model string, classes []string, e *store.Event) {
	if len(e.Scores) == 0 {
		return
	}
	if e.Kind == store.EventPrediction {
		for _, c := range classes {
			ch.Scores = append(ch.Scores, store.ScoreDelta{Model: model, Bucket: e.Bucket, Class: c, Bin: store.ScoreBin(e.Scores[c]), N: 1})
		}
		for c, s := range e.Scores {
			if bin := store.ScoreBin(s); bin > 0 && !slices.Contains(classes, c) {
				ch.Scores = append(ch.Scores, store.ScoreDelta{Model: model, Bucket: e.Bucket, Class: c, Bin: bin, N: 1})
			}
		}
		return
	}
	st, _ := store.NewScoreTerms(e.Scores, e.Predicted)
	move := func(actual string, n int64) {
		ch.Calibration = append(ch.Calibration, store.CalibrationDelta{Model: model, Bucket: e.Bucket, Bin: st.Bin, N: n, ScoreSum: store.FromNano(n * st.Pred), Correct: n * store.Correct(actual, e.Predicted)})
		ch.Brier = append(ch.Brier, store.BrierDelta{Model: model, Bucket: e.Bucket, N: n, Sum: store.FromNano(n * st.Brier(actual))})
	}
	if e.Old != "" {
		move(e.Old, -1)
	}
	move(e.Actual, 1)
}
