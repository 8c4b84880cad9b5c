package windows

import (
	"context"
	"errors"
	"fmt"
	"maps"
	"slices"
	"sync"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Commit runs txFunc, one store transaction that returns its committed
// changes and, per model, the greatest prediction time it stored, and then
// passes them to Apply, all with the commit gate held, so that a concurrent
// Refresh counts the commit exactly once (see the Tracker documentation).
// TrackedStore runs its writes through it. When txFunc
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
	cells       []store.CellDelta
	predicted   []store.PredictedDelta
	scores      []store.ScoreDelta
	calibration []store.CalibrationDelta
	brier       []store.BrierDelta
	latest      time.Time
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
	for _, d := range ch.Scores {
		mc := get(d.Model)
		mc.scores = append(mc.scores, d)
	}
	for _, d := range ch.Calibration {
		mc := get(d.Model)
		mc.calibration = append(mc.calibration, d)
	}
	for _, d := range ch.Brier {
		mc := get(d.Model)
		mc.brier = append(mc.brier, d)
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
			mc := scoreDeltas(info.Name, counts)
			mc.cells, mc.predicted = cellDeltas(info.Name, counts.Cells), predictedDeltas(info.Name, counts.Predicted)
			st.apply(mc)
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
