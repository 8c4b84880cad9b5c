package windows

import (
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
	// ReferenceWindow names the window, one of Windows, that the
	// early-warning figures of every window compare with (README.md
	// "Early warning"), usually a matured one; empty for none.
	ReferenceWindow string
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
	// MaxSeries is the series budget of one scrape of the tracker's
	// gatherer (NewGatherer); zero means DefaultMaxSeries, negative no
	// budget. See the package documentation.
	MaxSeries int
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
	maxSeries  int

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
	t.maxSeries = opts.MaxSeries
	if t.maxSeries == 0 {
		t.maxSeries = DefaultMaxSeries
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
	if mo.ReferenceWindow != "" && !seen[mo.ReferenceWindow] {
		return fmt.Errorf("reference window %s is not one of the model's windows", mo.ReferenceWindow)
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
