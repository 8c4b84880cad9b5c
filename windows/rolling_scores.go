package windows

import (
	"cmp"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Kinds of scoreEntry.
const (
	scoreHist  = iota // class's score histogram: class, bin, n
	scoreCalib        // calibration bin: bin, n, sum, correct
	scoreBrier        // Brier sum: n, sum
)

// scoreEntry is one non-zero score aggregate of a bucket (README.md "Early
// warning"), or a change to one.
type scoreEntry struct {
	kind, class, bin int32
	n, correct       int64
	sum              float64
}

// scoreEntries are one bucket's score aggregates, sorted by (kind, class,
// bin). An entry whose counts come to zero is dropped, and its float sum
// with it: with no prediction left, what remains of the sum is rounding.
type scoreEntries []scoreEntry

func compareScores(x, y scoreEntry) int {
	if c := cmp.Compare(x.kind, y.kind); c != 0 {
		return c
	}
	if c := cmp.Compare(x.class, y.class); c != 0 {
		return c
	}
	return cmp.Compare(x.bin, y.bin)
}

// add adds e and returns the updated slice.
func (s scoreEntries) add(e scoreEntry) scoreEntries {
	i, found := slices.BinarySearchFunc(s, e, compareScores)
	if !found {
		return slices.Insert(s, i, e)
	}
	s[i].n += e.n
	s[i].correct += e.correct
	s[i].sum += e.sum
	if s[i].n == 0 && s[i].correct == 0 {
		return slices.Delete(s, i, i+1)
	}
	return s
}

// addScore adds sign times e to the window sum.
func (sum *windowSum) addScore(e scoreEntry, sign int64) {
	s, f := sum.scores, float64(sign)
	switch e.kind {
	case scoreHist:
		s.Hist[e.class][e.bin] += sign * e.n
	case scoreCalib:
		c := &s.Calib[e.bin]
		c.N += sign * e.n
		c.Correct += sign * e.correct
		c.ScoreSum += f * e.sum
		if c.N == 0 {
			c.ScoreSum = 0
		}
	case scoreBrier:
		s.BrierN += sign * e.n
		s.BrierSum += f * e.sum
		if s.BrierN == 0 {
			s.BrierSum = 0
		}
	}
}

func addScoreBucket(sum *windowSum, b scoreEntries, sign int64) {
	for _, e := range b {
		sum.addScore(e, sign)
	}
}

// applyScores adds one model's score changes; their classes must be
// registered already.
func (st *modelState) applyScores(mc *modelChanges) {
	for _, d := range mc.scores {
		if d.Bin >= 0 && d.Bin < store.ScoreBins {
			st.addScore(d.Bucket, scoreEntry{kind: scoreHist, class: int32(st.index[d.Class]), bin: int32(d.Bin), n: d.N})
		}
	}
	for _, d := range mc.calibration {
		if d.Bin >= 0 && d.Bin < store.ScoreBins {
			st.addScore(d.Bucket, scoreEntry{kind: scoreCalib, bin: int32(d.Bin), n: d.N, correct: d.Correct, sum: d.ScoreSum})
		}
	}
	for _, d := range mc.brier {
		st.addScore(d.Bucket, scoreEntry{kind: scoreBrier, n: d.N, sum: d.Sum})
	}
}

// addScore adds e to the bucket holding t and to every window sum holding
// that bucket, as add does for counts.
func (st *modelState) addScore(t time.Time, e scoreEntry) {
	if e.n == 0 && e.correct == 0 && e.sum == 0 {
		return
	}
	key := BucketStart(t, st.opts.Bucket).UnixNano()
	if !st.wm.IsZero() && key < st.low(st.wm) {
		return
	}
	if b := st.scores[key].add(e); len(b) > 0 {
		st.scores[key] = b
	} else {
		delete(st.scores, key)
	}
	for w := range st.sums {
		if st.inWindow(w, key) {
			st.sums[w].addScore(e, 1)
		}
	}
}

// clone returns a deep copy of s.
func (s *ScoreSums) clone() *ScoreSums {
	c := *s
	c.Hist = slices.Clone(s.Hist)
	return &c
}

// grow extends s to k classes.
func (s *ScoreSums) grow(k int) {
	if k > len(s.Hist) {
		s.Hist = append(s.Hist, make([][store.ScoreBins]int64, k-len(s.Hist))...)
	}
}

// reset empties s, keeping its classes.
func (s *ScoreSums) reset() {
	*s = ScoreSums{Hist: s.Hist}
	clear(s.Hist)
}

// scoreDeltas turns a store read's score aggregates into changes.
func scoreDeltas(model string, c store.Counts) *modelChanges {
	mc := &modelChanges{}
	for _, s := range c.Scores {
		mc.scores = append(mc.scores, store.ScoreDelta{Model: model, Bucket: s.Bucket, Class: s.Class, Bin: s.Bin, N: s.N})
	}
	for _, s := range c.Calibration {
		mc.calibration = append(mc.calibration, store.CalibrationDelta{Model: model, Bucket: s.Bucket, Bin: s.Bin, N: s.N, ScoreSum: s.ScoreSum, Correct: s.Correct})
	}
	for _, s := range c.Brier {
		mc.brier = append(mc.brier, store.BrierDelta{Model: model, Bucket: s.Bucket, N: s.N, Sum: s.Sum})
	}
	return mc
}

// inRange calls f for each entry of m whose key is a bucket start in
// [from, to), stepping by step or walking the map, whichever is shorter.
func inRange[V any](m map[int64]V, from, to, step int64, f func(V)) {
	if (to-from)/step > int64(len(m)) {
		for key, v := range m {
			if key >= from && key < to {
				f(v)
			}
		}
		return
	}
	for key := from; key < to; key += step {
		if v, ok := m[key]; ok {
			f(v)
		}
	}
}

// dropBefore deletes the entries of m keyed before newLow; oldLow is where
// the previous drop stopped, unless first is set.
func dropBefore[V any](m map[int64]V, first bool, oldLow, newLow, step int64) {
	if first || (newLow-oldLow)/step > int64(len(m)) {
		for key := range m {
			if key < newLow {
				delete(m, key)
			}
		}
		return
	}
	for key := oldLow; key < newLow; key += step {
		delete(m, key)
	}
}
