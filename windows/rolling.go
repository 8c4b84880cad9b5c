package windows

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"maps"
	"slices"
	"sync"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Clock selects what a model's watermark follows.
type Clock string

// Clocks.
const (
	// ClockEvent puts the watermark at the end of the bucket holding the
	// latest prediction time seen for the model (the default).
	ClockEvent Clock = "event"
	// ClockWall puts it at the end of the bucket holding the current time.
	ClockWall Clock = "wall"
)

// DefaultBucket is the bucket width used when none is configured.
const DefaultBucket = 5 * time.Minute

// readHorizonUnix (2200-01-01T00:00:00Z) bounds the bucket starts Load and
// Refresh read. Stores that keep times as int64 nanoseconds overflow in
// 2262; a prediction dated after the horizon is not read back.
const readHorizonUnix = 7258118400

// ModelOptions configure one model's rolling windows.
type ModelOptions struct {
	Name string
	// Bucket is the width of the model's buckets; zero means the tracker's
	// default.
	Bucket time.Duration
	// Windows are the model's windows; nil means the tracker's default.
	Windows []Window
}

// TrackerOptions configure a Tracker.
type TrackerOptions struct {
	// Models configures named models. Any other model is registered the
	// first time it is seen, with DefaultBucket and DefaultWindows.
	Models         []ModelOptions
	DefaultBucket  time.Duration
	DefaultWindows []Window
	// Clock is ClockEvent (the default) or ClockWall.
	Clock Clock
	// Now returns the current time; it is read only with ClockWall.
	// Defaults to time.Now.
	Now func() time.Time
	// Store is read by Load and Refresh; a tracker without a store is fed
	// by Apply alone.
	Store store.Store
}

// Tracker keeps, per model, the confusion counts of every configured window
// at the model's current watermark, in memory and current at all times, so
// that a scrape costs no store read.
//
// # State
//
// Per model the tracker holds the per-bucket deltas of every bucket a
// window can still reach and, per window, a running sum over the window's
// buckets. A committed change (Apply) is added to its bucket and to the
// sum of every window whose bounds hold that bucket. When the watermark
// moves, each window subtracts the buckets that left it and adds those that
// entered, and buckets older than W minus the longest window span are
// dropped. The watermark never moves back, so a dropped bucket can never
// re-enter a window, and a late label correction for such a bucket is
// ignored.
//
// A bucket holds few labeled predictions, so most of its n² cells are zero:
// buckets keep only their non-zero cells and predicted counts, 16 bytes
// each plus about 40 bytes of map entry per non-empty bucket, while each
// window's sum stays a dense Matrix of (n²+n)·8 bytes for n classes, which
// is what views read. A bucket busy enough to fill all n²+n counts costs
// twice its dense size; with 12 classes that takes hundreds of labeled
// predictions in one bucket.
//
// # Several replicas, and counting each commit once
//
// Each replica sees only its own commits through Apply. Refresh re-reads
// the reachable buckets and the latest prediction time of every model from
// the store, so other replicas' commits show after at most one refresh
// interval: that is how stale their share of the figures can be. The
// replica's own commits are never lost and never counted twice, at any
// moment, not only once a later Refresh has rebuilt the state.
//
// For that Refresh must know which of the replica's commits its read holds.
// A commit gate tells it: Commit holds the gate's read side from before its
// store transaction begins until its changes are applied, and Refresh takes
// the write side, which waits until every commit in flight has been
// applied and holds new ones back. With the gate closed, Refresh starts a
// journal of Apply calls and has the store fix one read snapshot
// (store.Store.Snapshot), then opens the gate. The snapshot therefore
// holds every commit applied before the journal started and none of those
// that began after the gate opened, whose Apply calls the journal records.
// Refresh reads every model from the snapshot without holding the
// tracker's lock, swaps the new state in and replays the whole journal
// onto it, so each local commit is counted once: from the snapshot or from
// the journal.
//
// Ingest pays for this only while the gate is closed: a new commit waits
// for the commits already in flight (batches, default-label jobs) to
// finish, then for the moment the store takes to fix a snapshot (a BEGIN
// and one statement). The read itself runs with the gate open. A change passed to Apply directly, not through Commit,
// bypasses the gate: a Refresh running at the time may count it twice
// until the next Refresh.
//
// A Tracker is safe for concurrent use by multiple goroutines.
type Tracker struct {
	store      store.Store
	clock      Clock
	now        func() time.Time
	configured map[string]ModelOptions
	defaults   ModelOptions

	// syncMu serialises Load and Refresh, which share the journal.
	syncMu sync.Mutex
	// gate orders commits against Refresh's snapshot: Commit holds the read
	// side across its store transaction and Apply; sync holds the write
	// side from the start of the journal until the snapshot is fixed.
	gate sync.RWMutex

	mu     sync.RWMutex
	models map[string]*modelState
	// journal holds the changes applied since a Refresh closed the gate,
	// when recording; nil otherwise.
	recording bool
	journal   []map[string]*modelChanges
}

// NewTracker checks opts and returns a tracker with every configured model
// registered (no classes, no watermark yet).
func NewTracker(opts TrackerOptions) (*Tracker, error) {
	t := &Tracker{
		store:      opts.Store,
		clock:      opts.Clock,
		now:        opts.Now,
		configured: make(map[string]ModelOptions, len(opts.Models)),
		models:     make(map[string]*modelState),
	}
	if t.clock == "" {
		t.clock = ClockEvent
	}
	if t.clock != ClockEvent && t.clock != ClockWall {
		return nil, fmt.Errorf("unknown clock %q: want %q or %q", opts.Clock, ClockEvent, ClockWall)
	}
	if t.now == nil {
		t.now = time.Now
	}
	t.defaults = ModelOptions{Bucket: opts.DefaultBucket, Windows: slices.Clone(opts.DefaultWindows)}
	if t.defaults.Bucket == 0 {
		t.defaults.Bucket = DefaultBucket
	}
	if err := validateWindows(t.defaults); err != nil {
		return nil, fmt.Errorf("default windows: %w", err)
	}
	for _, mo := range opts.Models {
		if mo.Name == "" {
			return nil, errors.New("model options need a name")
		}
		if _, dup := t.configured[mo.Name]; dup {
			return nil, fmt.Errorf("model %s configured twice", mo.Name)
		}
		if mo.Bucket == 0 {
			mo.Bucket = t.defaults.Bucket
		}
		if mo.Windows == nil {
			mo.Windows = t.defaults.Windows
		}
		mo.Windows = slices.Clone(mo.Windows)
		if err := validateWindows(mo); err != nil {
			return nil, fmt.Errorf("model %s: %w", mo.Name, err)
		}
		t.configured[mo.Name] = mo
		t.models[mo.Name] = newModelState(mo)
	}
	return t, nil
}

func validateWindows(mo ModelOptions) error {
	seen := make(map[string]bool, len(mo.Windows))
	for _, w := range mo.Windows {
		if err := w.Validate(mo.Bucket); err != nil {
			return err
		}
		if seen[w.Name] {
			return fmt.Errorf("window %s defined twice", w.Name)
		}
		seen[w.Name] = true
	}
	return nil
}

// Options returns the bucket width and windows that apply to model: its
// own when configured, the defaults otherwise.
func (t *Tracker) Options(model string) ModelOptions {
	if mo, ok := t.configured[model]; ok {
		mo.Windows = slices.Clone(mo.Windows)
		return mo
	}
	return ModelOptions{Name: model, Bucket: t.defaults.Bucket, Windows: slices.Clone(t.defaults.Windows)}
}

// state returns model's state, registering the model with its options when
// new. t.mu must be held for writing.
func (t *Tracker) state(model string) *modelState {
	st, ok := t.models[model]
	if !ok {
		st = newModelState(t.Options(model))
		t.models[model] = st
	}
	return st
}

// target returns the watermark st should be at now.
func (t *Tracker) target(st *modelState) time.Time {
	if t.clock == ClockWall {
		return Watermark(t.now(), st.opts.Bucket)
	}
	return Watermark(st.latest, st.opts.Bucket)
}

// SetClasses extends model's class list with the classes it does not have
// yet, in the order given (the store's registration order). Class lists
// only grow.
func (t *Tracker) SetClasses(model string, classes []string) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.state(model).ensureClasses(classes)
}

// Commit runs txFunc, one store transaction that returns its committed
// changes and, per model, the greatest prediction time it stored, and then
// passes them to Apply, all with the commit gate held, so that a concurrent
// Refresh counts the commit exactly once (see the Tracker documentation).
// It is the collector's commit hook (collector.CommitFunc). When txFunc
// fails nothing is applied and its error is returned as it is. txFunc must
// not call Commit, Load or Refresh.
func (t *Tracker) Commit(txFunc func() (store.Changes, map[string]time.Time, error)) error {
	t.gate.RLock()
	defer t.gate.RUnlock()
	ch, latest, err := txFunc()
	if err != nil {
		return err
	}
	t.Apply(ch, latest)
	return nil
}

// Apply adds the changes of one committed store call and moves each model's
// watermark on to cover latest, the greatest prediction time of the call
// per model. A class the model does not have yet is appended to its class
// list; call SetClasses first to keep the store's class order. Apply copies
// what it keeps of ch. A tracker that is refreshed from a store must get
// its commits through Commit instead, which calls Apply inside the commit
// gate.
func (t *Tracker) Apply(ch store.Changes, latest map[string]time.Time) {
	byModel := groupChanges(ch, latest)
	t.mu.Lock()
	defer t.mu.Unlock()
	if t.recording {
		t.journal = append(t.journal, byModel)
	}
	for _, name := range slices.Sorted(maps.Keys(byModel)) {
		st := t.state(name)
		st.apply(byModel[name])
		st.advance(t.target(st))
	}
}

// modelChanges are one model's share of an Apply call.
type modelChanges struct {
	cells     []store.CellDelta
	predicted []store.PredictedDelta
	latest    time.Time
}

func groupChanges(ch store.Changes, latest map[string]time.Time) map[string]*modelChanges {
	out := make(map[string]*modelChanges)
	get := func(model string) *modelChanges {
		mc, ok := out[model]
		if !ok {
			mc = &modelChanges{}
			out[model] = mc
		}
		return mc
	}
	for model, at := range latest {
		get(model).latest = at
	}
	for _, d := range ch.Cells {
		mc := get(d.Model)
		mc.cells = append(mc.cells, d)
	}
	for _, d := range ch.Predicted {
		mc := get(d.Model)
		mc.predicted = append(mc.predicted, d)
	}
	return out
}

// Load reads every model's reachable buckets and latest prediction time
// from the store, replacing the in-memory state. The daemon calls it once at
// start-up, before serving.
func (t *Tracker) Load(ctx context.Context) error {
	if err := t.sync(ctx); err != nil {
		return fmt.Errorf("load rolling windows: %w", err)
	}
	return nil
}

// Refresh re-reads the reachable buckets from the store so that commits of
// other replicas sharing the database show in the windows; see the Tracker
// documentation for how it counts concurrent commits exactly once. It holds
// new commits back only until the store has fixed its read snapshot. Call
// it every refresh interval, which bounds how stale other replicas'
// commits are.
func (t *Tracker) Refresh(ctx context.Context) error {
	if err := t.sync(ctx); err != nil {
		return fmt.Errorf("refresh rolling windows: %w", err)
	}
	return nil
}

func (t *Tracker) sync(ctx context.Context) error {
	if t.store == nil {
		return errors.New("tracker has no store")
	}
	t.syncMu.Lock()
	defer t.syncMu.Unlock()

	// Close the gate: commits in flight finish and are applied, new ones
	// wait. The journal starts empty, and the gate opens again as soon as
	// the store has fixed the snapshot, or when sync returns if it never
	// does.
	t.gate.Lock()
	var opened sync.Once
	open := func() { opened.Do(t.gate.Unlock) }
	defer open()
	t.mu.Lock()
	t.recording, t.journal = true, nil
	t.mu.Unlock()
	defer func() {
		t.mu.Lock()
		t.recording, t.journal = false, nil
		t.mu.Unlock()
	}()

	var fresh map[string]*modelState
	err := t.store.Snapshot(ctx, open, func(r store.SnapshotReader) error {
		var err error
		fresh, err = t.read(ctx, r)
		return err
	})
	if err != nil {
		return err
	}

	t.mu.Lock()
	defer t.mu.Unlock()
	for name, st := range fresh {
		if live, ok := t.models[name]; ok {
			// Classes registered while the read ran, and the latest time
			// Apply saw, come from the live state.
			st.ensureClasses(live.classes)
			st.latest = later(st.latest, live.latest)
			st.advance(live.wm)
		}
		// The snapshot holds every commit applied before the journal
		// started and none of those journaled since.
		for _, entry := range t.journal {
			if mc, ok := entry[name]; ok {
				st.apply(mc)
			}
		}
		st.advance(t.target(st))
		t.models[name] = st
	}
	return nil
}

// read builds every model's state from the snapshot r.
func (t *Tracker) read(ctx context.Context, r store.SnapshotReader) (map[string]*modelState, error) {
	infos, err := r.Models(ctx)
	if err != nil {
		return nil, fmt.Errorf("list models: %w", err)
	}
	fresh := make(map[string]*modelState, len(infos))
	for _, info := range infos {
		st := newModelState(t.Options(info.Name))
		st.ensureClasses(info.Classes)
		st.latest = info.LatestAt
		t.mu.RLock()
		if live, ok := t.models[info.Name]; ok {
			st.latest = later(st.latest, live.latest)
		}
		t.mu.RUnlock()

		// The read starts at the oldest bucket a window reaches at the
		// watermark the latest known prediction gives; the state is moved
		// there at once so the swap never needs an older bucket.
		if w := t.target(st); !w.IsZero() {
			counts, err := r.Counts(ctx, store.Query{Model: info.Name, From: w.Add(-st.reach), To: time.Unix(readHorizonUnix, 0).UTC()})
			if err != nil {
				return nil, fmt.Errorf("read counts of %s: %w", info.Name, err)
			}
			st.apply(&modelChanges{cells: cellDeltas(info.Name, counts.Cells), predicted: predictedDeltas(info.Name, counts.Predicted)})
			st.advance(w)
		}
		fresh[info.Name] = st
	}
	return fresh, nil
}

func cellDeltas(model string, cells []store.Cell) []store.CellDelta {
	out := make([]store.CellDelta, len(cells))
	for i, c := range cells {
		out[i] = store.CellDelta{Model: model, Bucket: c.Bucket, Actual: c.Actual, Predicted: c.Predicted, N: c.N}
	}
	return out
}

func predictedDeltas(model string, counts []store.PredictedCount) []store.PredictedDelta {
	out := make([]store.PredictedDelta, len(counts))
	for i, c := range counts {
		out[i] = store.PredictedDelta{Model: model, Bucket: c.Bucket, Predicted: c.Predicted, N: c.N}
	}
	return out
}

func later(a, b time.Time) time.Time {
	if b.After(a) {
		return b
	}
	return a
}

// Models returns the names of every model the tracker knows, sorted.
func (t *Tracker) Models() []string {
	t.mu.RLock()
	defer t.mu.RUnlock()
	return slices.Sorted(maps.Keys(t.models))
}

// Watermark returns model's current watermark (zero before its first
// prediction under ClockEvent) and whether the model is known.
func (t *Tracker) Watermark(model string) (time.Time, bool) {
	st, unlock, ok := t.current(model)
	if !ok {
		return time.Time{}, false
	}
	defer unlock()
	return st.wm, true
}

// View returns a snapshot of one window of model.
func (t *Tracker) View(model, window string) (View, bool) {
	st, unlock, ok := t.current(model)
	if !ok {
		return View{}, false
	}
	defer unlock()
	for i, w := range st.opts.Windows {
		if w.Name == window {
			return st.view(model, i), true
		}
	}
	return View{}, false
}

// Views returns a snapshot of every window of model, in configured order;
// nil for an unknown model.
func (t *Tracker) Views(model string) []View {
	st, unlock, ok := t.current(model)
	if !ok {
		return nil
	}
	defer unlock()
	out := make([]View, len(st.opts.Windows))
	for i := range st.opts.Windows {
		out[i] = st.view(model, i)
	}
	return out
}

// current returns model's state with its watermark brought up to date and a
// read lock held, released by calling unlock. Under ClockWall the
// watermark follows the clock even without traffic, so a reader may have
// to advance it first.
func (t *Tracker) current(model string) (st *modelState, unlock func(), ok bool) {
	t.mu.RLock()
	st, ok = t.models[model]
	if !ok {
		t.mu.RUnlock()
		return nil, nil, false
	}
	if target := t.target(st); !target.After(st.wm) {
		return st, t.mu.RUnlock, true
	}
	t.mu.RUnlock()
	t.mu.Lock()
	st = t.models[model] // a Refresh may have swapped it meanwhile
	st.advance(t.target(st))
	return st, t.mu.Unlock, true
}

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
	m    *Matrix
	pred []int64
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
	sums    []windowSum            // in opts.Windows order
}

func newModelState(opts ModelOptions) *modelState {
	st := &modelState{
		opts:    opts,
		index:   make(map[string]int),
		buckets: make(map[int64]bucketCounts),
		sums:    make([]windowSum, len(opts.Windows)),
	}
	for i, w := range opts.Windows {
		st.reach = max(st.reach, w.Span())
		st.sums[i] = windowSum{m: NewMatrix(nil)}
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
	st.ensureClasses(names)
	for _, d := range mc.cells {
		st.add(d.Bucket, st.index[d.Actual], st.index[d.Predicted], d.N)
	}
	for _, d := range mc.predicted {
		st.add(d.Bucket, predictedOnly, st.index[d.Predicted], d.N)
	}
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
	if (to-from)/step > int64(len(st.buckets)) {
		// Fewer buckets held than steps in the range: walk the map.
		for key, b := range st.buckets {
			if key >= from && key < to {
				addBucket(sum, b, sign)
			}
		}
		return
	}
	for key := from; key < to; key += step {
		if b, ok := st.buckets[key]; ok {
			addBucket(sum, b, sign)
		}
	}
}

func addBucket(sum *windowSum, b bucketCounts, sign int64) {
	for _, c := range b {
		sum.add(int(c.actual), int(c.predicted), sign*c.n)
	}
}

// drop forgets the buckets starting before the oldest one a window can
// reach at the new watermark wm.
func (st *modelState) drop(wm time.Time) {
	newLow := st.low(wm)
	if st.wm.IsZero() || (newLow-st.low(st.wm))/int64(st.opts.Bucket) > int64(len(st.buckets)) {
		for key := range st.buckets {
			if key < newLow {
				delete(st.buckets, key)
			}
		}
		return
	}
	for key := st.low(st.wm); key < newLow; key += int64(st.opts.Bucket) {
		delete(st.buckets, key)
	}
}

// view snapshots window i.
func (st *modelState) view(model string, i int) View {
	v := View{
		Model:     model,
		Window:    st.opts.Windows[i],
		Watermark: st.wm,
		Matrix:    st.sums[i].m.Clone(),
		Predicted: slices.Clone(st.sums[i].pred),
	}
	if !st.wm.IsZero() {
		v.From, v.To = v.Window.Bounds(st.wm)
	}
	return v
}
