package windows

import (
	"cmp"
	"slices"
	"time"
)

// bucketCount is one non-zero count of a bucket: cell (actual, predicted),
// or, when actual is predictedOnly, the number of predictions of class
// predicted. Class indices, not a dense cell index, name the cell, so an
// entry stays valid when the class list grows.
type bucketCount struct {
	actual, predicted int32
	n                 int64
}

// predictedOnly marks a bucketCount as a predicted count; it sorts before
// every cell.
const predictedOnly = -1

// bucketCounts are one bucket's non-zero counts, sorted by (actual,
// predicted). Cells and predicted counts share one slice to keep a bucket
// to one allocation.
type bucketCounts []bucketCount

// add adds n to the count of (actual, predicted), dropping it when it comes
// to zero, and returns the updated slice.
func (b bucketCounts) add(actual, predicted int32, n int64) bucketCounts {
	i, found := slices.BinarySearchFunc(b, bucketCount{actual: actual, predicted: predicted}, compareCounts)
	switch {
	case !found:
		return slices.Insert(b, i, bucketCount{actual: actual, predicted: predicted, n: n})
	case b[i].n+n == 0:
		return slices.Delete(b, i, i+1)
	}
	b[i].n += n
	return b
}

// compareCounts orders counts by actual, then predicted class index, which
// puts predicted counts first and cells in a Matrix's row-major order.
func compareCounts(x, y bucketCount) int {
	if c := cmp.Compare(x.actual, y.actual); c != 0 {
		return c
	}
	return cmp.Compare(x.predicted, y.predicted)
}

// windowSum is a window's running sum over its buckets.
type windowSum struct {
	m      *Matrix
	pred   []int64
	scores *ScoreSums
}

// add adds n to cell (actual, predicted), or to the predicted count of
// predicted when actual is predictedOnly.
func (sum *windowSum) add(actual, predicted int, n int64) {
	if actual == predictedOnly {
		sum.pred[predicted] += n
		return
	}
	sum.m.Add(actual, predicted, n)
}

// modelState is one model's rolling state. Methods need the tracker's lock.
type modelState struct {
	opts ModelOptions
	// reach is the longest window span: buckets starting before wm−reach
	// are dropped.
	reach   time.Duration
	classes []string
	index   map[string]int
	latest  time.Time
	// wm is the watermark the sums are current for; zero until the first.
	wm      time.Time
	buckets map[int64]bucketCounts // by bucket start, Unix nanoseconds; never empty
	scores  map[int64]scoreEntries // score aggregates, keyed as buckets; never empty
	sums    []windowSum            // in opts.Windows order
	// ref is the index of the reference window in opts.Windows, or −1.
	ref int
}

func newModelState(opts ModelOptions) *modelState {
	st := &modelState{
		opts:    opts,
		index:   make(map[string]int),
		buckets: make(map[int64]bucketCounts),
		scores:  make(map[int64]scoreEntries),
		sums:    make([]windowSum, len(opts.Windows)),
		ref:     -1,
	}
	for i, w := range opts.Windows {
		st.reach = max(st.reach, w.Span())
		st.sums[i] = windowSum{m: NewMatrix(nil), scores: NewScoreSums(0)}
		if w.Name == opts.ReferenceWindow {
			st.ref = i
		}
	}
	return st
}

// ensureClasses appends the classes st does not have yet, growing every
// sum. Buckets name cells by class index and need no change.
func (st *modelState) ensureClasses(classes []string) {
	var added []string
	for _, c := range classes {
		if _, ok := st.index[c]; !ok && !slices.Contains(added, c) {
			added = append(added, c)
		}
	}
	if len(added) == 0 {
		return
	}
	old := len(st.classes)
	st.classes = append(slices.Clone(st.classes), added...)
	for _, c := range added {
		st.index[c] = len(st.index)
	}
	n := len(st.classes)
	for i := range st.sums {
		g, err := st.sums[i].m.Grow(st.classes)
		if err != nil {
			panic(err) // unreachable: st.classes extends the sum's classes
		}
		st.sums[i].m = g
		st.sums[i].pred = append(st.sums[i].pred, make([]int64, n-old)...)
		st.sums[i].scores.grow(n)
	}
}

// low returns the start of the oldest bucket a window can reach at wm.
func (st *modelState) low(wm time.Time) int64 {
	return wm.Add(-st.reach).UnixNano()
}

// apply adds one model's changes; the caller advances the watermark after.
func (st *modelState) apply(mc *modelChanges) {
	st.latest = later(st.latest, mc.latest)
	var names []string
	for _, d := range mc.cells {
		names = append(names, d.Actual, d.Predicted)
	}
	for _, d := range mc.predicted {
		names = append(names, d.Predicted)
	}
	for _, d := range mc.scores {
		names = append(names, d.Class)
	}
	st.ensureClasses(names)
	for _, d := range mc.cells {
		st.add(d.Bucket, st.index[d.Actual], st.index[d.Predicted], d.N)
	}
	for _, d := range mc.predicted {
		st.add(d.Bucket, predictedOnly, st.index[d.Predicted], d.N)
	}
	st.applyScores(mc)
}

// add adds n to count (actual, predicted) of the bucket holding t and of
// every window sum holding that bucket; actual is predictedOnly for a
// predicted count. A bucket too old for any window is ignored.
func (st *modelState) add(t time.Time, actual, predicted int, n int64) {
	if n == 0 {
		return
	}
	key := BucketStart(t, st.opts.Bucket).UnixNano()
	if !st.wm.IsZero() && key < st.low(st.wm) {
		return
	}
	if b := st.buckets[key].add(int32(actual), int32(predicted), n); len(b) > 0 {
		st.buckets[key] = b
	} else {
		delete(st.buckets, key)
	}
	for w := range st.sums {
		if st.inWindow(w, key) {
			st.sums[w].add(actual, predicted, n)
		}
	}
}

func (st *modelState) inWindow(w int, key int64) bool {
	if st.wm.IsZero() {
		return false
	}
	from, to := st.opts.Windows[w].Bounds(st.wm)
	return key >= from.UnixNano() && key < to.UnixNano()
}

// advance moves the watermark forward to wm (never back), updating each
// window's sum by the buckets that left and entered it, then dropping the
// buckets no window can reach any more.
func (st *modelState) advance(wm time.Time) {
	if !wm.After(st.wm) {
		return
	}
	step := int64(st.opts.Bucket)
	for w, win := range st.opts.Windows {
		newFrom, newTo := win.Bounds(wm)
		nf, nt := newFrom.UnixNano(), newTo.UnixNano()
		sum := &st.sums[w]
		if st.wm.IsZero() {
			st.addRange(sum, nf, nt, step, 1)
			continue
		}
		oldFrom, oldTo := win.Bounds(st.wm)
		of, ot := oldFrom.UnixNano(), oldTo.UnixNano()
		if nf >= ot {
			// No overlap: start the sum over.
			clear(sum.m.cells)
			clear(sum.pred)
			sum.scores.reset()
			st.addRange(sum, nf, nt, step, 1)
			continue
		}
		st.addRange(sum, of, nf, step, -1)
		st.addRange(sum, ot, nt, step, 1)
	}
	st.drop(wm)
	st.wm = wm
}

// addRange adds sign times each bucket starting in [from, to) to sum.
func (st *modelState) addRange(sum *windowSum, from, to, step int64, sign int64) {
	inRange(st.buckets, from, to, step, func(b bucketCounts) { addBucket(sum, b, sign) })
	inRange(st.scores, from, to, step, func(b scoreEntries) { addScoreBucket(sum, b, sign) })
}

func addBucket(sum *windowSum, b bucketCounts, sign int64) {
	for _, c := range b {
		sum.add(int(c.actual), int(c.predicted), sign*c.n)
	}
}

// drop forgets the buckets starting before the oldest one a window can
// reach at the new watermark wm.
func (st *modelState) drop(wm time.Time) {
	var oldLow int64
	if !st.wm.IsZero() {
		oldLow = st.low(st.wm)
	}
	step := int64(st.opts.Bucket)
	dropBefore(st.buckets, st.wm.IsZero(), oldLow, st.low(wm), step)
	dropBefore(st.scores, st.wm.IsZero(), oldLow, st.low(wm), step)
}

// view snapshots window i.
func (st *modelState) view(model string, i int) View {
	v := View{
		Model:     model,
		Window:    st.opts.Windows[i],
		Watermark: st.wm,
		Matrix:    st.sums[i].m.Clone(),
		Predicted: slices.Clone(st.sums[i].pred),
		Scores:    st.sums[i].scores.clone(),
	}
	if st.ref >= 0 {
		v.Reference = &Reference{Matrix: st.sums[st.ref].m.Clone(), Scores: st.sums[st.ref].scores.clone()}
	}
	if !st.wm.IsZero() {
		v.From, v.To = v.Window.Bounds(st.wm)
	}
	return v
}
