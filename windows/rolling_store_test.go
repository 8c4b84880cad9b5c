package windows_test

import (
	"context"
	"fmt"
	"math/rand/v2"
	"runtime"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// traffic writes random batches of predictions and labels (late labels,
// early labels, corrections, duplicates) for a fictional parcel-sorting
// line through the store, each store call run through a commit hook. A
// traffic is used by one goroutine at a time.
type traffic struct {
	s      store.Store
	rng    *rand.Rand
	model  string
	prefix string // of prediction ids
	bucket time.Duration
	at     time.Time
	next   int
	// maxPreds and maxLabels bound the lines of one batch.
	maxPreds, maxLabels int
}

var sorterClasses = []string{"intact", "damaged", "mislabeled"}

// commitHook runs one store transaction and passes its changes on:
// Tracker.Commit, or a test's own.
type commitHook func(txFunc func() (store.Changes, map[string]time.Time, error)) error

// applying returns a commit hook that runs the transaction and hands its
// changes to each apply, with no commit gate: for trackers that are not
// refreshed while it runs.
func applying(apply ...func(store.Changes, map[string]time.Time)) commitHook {
	return func(txFunc func() (store.Changes, map[string]time.Time, error)) error {
		ch, latest, err := txFunc()
		if err != nil {
			return err
		}
		for _, a := range apply {
			a(ch, latest)
		}
		return nil
	}
}

// batch commits one random prediction batch, then one random label batch,
// through commit.
func (tf *traffic) batch(tb testing.TB, commit commitHook) {
	tb.Helper()
	if err := tf.commitBatch(context.Background(), commit); err != nil {
		tb.Fatal(err)
	}
}

// commitBatch is batch for goroutines other than the test's.
func (tf *traffic) commitBatch(ctx context.Context, commit commitHook) error {
	if err := commit(func() (store.Changes, map[string]time.Time, error) { return tf.predictions(ctx) }); err != nil {
		return fmt.Errorf("commit predictions: %w", err)
	}
	if err := commit(func() (store.Changes, map[string]time.Time, error) { return tf.labels(ctx) }); err != nil {
		return fmt.Errorf("commit labels: %w", err)
	}
	return nil
}

// predictions stores a random prediction batch and returns what the
// collector would pass on.
func (tf *traffic) predictions(ctx context.Context) (store.Changes, map[string]time.Time, error) {
	var preds []store.Prediction
	for range 1 + tf.rng.IntN(tf.maxPreds) {
		tf.at = tf.at.Add(time.Duration(tf.rng.IntN(int(3 * time.Minute))))
		preds = append(preds, store.Prediction{
			Model: tf.model, ID: fmt.Sprintf("%s%d", tf.prefix, tf.next), At: tf.at,
			Bucket: windows.BucketStart(tf.at, tf.bucket), Predicted: sorterClasses[tf.rng.IntN(3)],
		})
		tf.next++
	}
	pr, err := tf.s.IngestPredictions(ctx, preds, tf.at)
	if err != nil {
		return store.Changes{}, nil, err
	}
	return pr.Changes, map[string]time.Time{tf.model: tf.at}, nil
}

// labels stores a random label batch.
func (tf *traffic) labels(ctx context.Context) (store.Changes, map[string]time.Time, error) {
	var labels []store.Label
	for range tf.rng.IntN(tf.maxLabels + 1) {
		// Mostly earlier parcels, sometimes one not yet predicted (early).
		id := tf.rng.IntN(tf.next + 5)
		labels = append(labels, store.Label{Model: tf.model, ID: fmt.Sprintf("%s%d", tf.prefix, id),
			Actual: sorterClasses[tf.rng.IntN(3)], At: tf.at.Add(time.Duration(tf.rng.IntN(1000)) * time.Second)})
	}
	lr, err := tf.s.IngestLabels(ctx, labels, tf.at)
	if err != nil {
		return store.Changes{}, nil, err
	}
	return lr.Changes, nil, nil
}

func newTraffic(tb testing.TB, s store.Store, seed uint64) *traffic {
	tb.Helper()
	if _, err := s.EnsureModel(context.Background(), "parcel-sorter", sorterClasses, 0); err != nil {
		tb.Fatal(err)
	}
	return &traffic{s: s, rng: rand.New(rand.NewPCG(seed, 7)), model: "parcel-sorter", prefix: "parcel-", bucket: 5 * time.Minute, at: t0, maxPreds: 20, maxLabels: 24}
}

var sorterWindows = []windows.Window{
	{Name: "1h", Length: time.Hour},
	{Name: "3h", Length: 3 * time.Hour},
	{Name: "2h-matured", Length: 2 * time.Hour, Lag: time.Hour},
}

func newSorterTracker(tb testing.TB, s store.Store) *windows.Tracker {
	tb.Helper()
	tr, err := windows.NewTracker(windows.TrackerOptions{
		Store:          s,
		DefaultBucket:  5 * time.Minute,
		DefaultWindows: sorterWindows,
	})
	if err != nil {
		tb.Fatal(err)
	}
	return tr
}

// checkAgainstStore compares every window of tr with the store's own sums
// over the window's bounds.
func checkAgainstStore(t *testing.T, s store.Store, tr *windows.Tracker, model string) {
	t.Helper()
	views := tr.Views(model)
	if len(views) == 0 {
		t.Fatalf("no windows for %s", model)
	}
	for _, v := range views {
		c, err := s.Counts(context.Background(), store.Query{Model: model, From: v.From, To: v.To})
		if err != nil {
			t.Fatal(err)
		}
		m, pred, err := windows.FromCounts(v.Matrix.Classes(), c)
		if err != nil {
			t.Fatal(err)
		}
		if got, want := v.Matrix.Dense(), m.Dense(); !slices.EqualFunc(got, want, slices.Equal) {
			t.Errorf("%s: matrix %v, store says %v", v.Window.Name, got, want)
		}
		if got, want := v.Predicted, pred; !slices.Equal(got, want) {
			t.Errorf("%s: predicted %v, store says %v", v.Window.Name, got, want)
		}
	}
}

func sameViews(t *testing.T, got, want *windows.Tracker, model string) {
	t.Helper()
	gv, wv := got.Views(model), want.Views(model)
	if len(gv) != len(wv) {
		t.Fatalf("%d views, want %d", len(gv), len(wv))
	}
	for i := range gv {
		g, w := gv[i], wv[i]
		if !g.Watermark.Equal(w.Watermark) || !g.From.Equal(w.From) || !g.To.Equal(w.To) {
			t.Errorf("%s: watermark %s [%s, %s), want %s [%s, %s)", g.Window.Name, g.Watermark, g.From, g.To, w.Watermark, w.From, w.To)
		}
		if !slices.Equal(g.Matrix.Classes(), w.Matrix.Classes()) {
			t.Errorf("%s: classes %v, want %v", g.Window.Name, g.Matrix.Classes(), w.Matrix.Classes())
			continue
		}
		if !slices.EqualFunc(g.Matrix.Dense(), w.Matrix.Dense(), slices.Equal) || !slices.Equal(g.Predicted, w.Predicted) {
			t.Errorf("%s: %v %v, want %v %v", g.Window.Name, g.Matrix.Dense(), g.Predicted, w.Matrix.Dense(), w.Predicted)
		}
	}
}

// TestTrackerLoadAndRefreshMatchApply drives a real store, keeping one
// tracker current through Commit, and checks that a tracker loaded from the
// store, and one refreshed after missing commits (another replica's view),
// hold the same windows, which also equal the store's own sums.
func TestTrackerLoadAndRefreshMatchApply(t *testing.T) {
	ctx := context.Background()
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tf := newTraffic(t, s, 1)
	live := newSorterTracker(t, s)
	live.SetClasses("parcel-sorter", sorterClasses)
	replica := newSorterTracker(t, s)
	if err := replica.Load(ctx); err != nil {
		t.Fatal(err)
	}
	for range 60 {
		tf.batch(t, live.Commit)
	}
	checkAgainstStore(t, s, live, "parcel-sorter")

	loaded := newSorterTracker(t, s)
	if err := loaded.Load(ctx); err != nil {
		t.Fatal(err)
	}
	sameViews(t, loaded, live, "parcel-sorter")

	if err := replica.Refresh(ctx); err != nil {
		t.Fatal(err)
	}
	sameViews(t, replica, live, "parcel-sorter")

	// After more traffic, the loaded tracker follows through Apply alone.
	for range 30 {
		tf.batch(t, applying(live.Apply, loaded.Apply))
	}
	sameViews(t, loaded, live, "parcel-sorter")
	checkAgainstStore(t, s, loaded, "parcel-sorter")
}

// snapshotHookStore is a real store whose Snapshot calls taken when the
// snapshot is fixed (before the tracker's own fixedFunc) and read around
// the tracker's reads, to place commits at each point of Refresh.
type snapshotHookStore struct {
	store.Store
	taken func()
	read  func()
}

func (h *snapshotHookStore) Snapshot(ctx context.Context, fixedFunc func(), readFunc func(store.SnapshotReader) error) error {
	return h.Store.Snapshot(ctx, func() {
		if h.taken != nil {
			h.taken()
		}
		fixedFunc()
	}, func(r store.SnapshotReader) error {
		if h.read != nil {
			h.read()
		}
		err := readFunc(r)
		if h.read != nil {
			h.read()
		}
		return err
	})
}

// TestTrackerRefreshKeepsConcurrentCommits commits batches once Refresh
// has fixed its snapshot, both before and after it reads, and before it
// swaps its state in: the snapshot does not hold them, so their Apply
// calls must survive the swap, once each.
func TestTrackerRefreshKeepsConcurrentCommits(t *testing.T) {
	ctx := context.Background()
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tf := newTraffic(t, s, 2)
	wrapped := &snapshotHookStore{Store: s}
	tr := newSorterTracker(t, wrapped)
	tr.SetClasses("parcel-sorter", sorterClasses)
	for range 20 {
		tf.batch(t, tr.Commit)
	}
	wrapped.read = func() {
		for range 3 {
			tf.batch(t, tr.Commit)
		}
	}
	if err := tr.Refresh(ctx); err != nil {
		t.Fatal(err)
	}
	wrapped.read = nil
	checkAgainstStore(t, s, tr, "parcel-sorter")
}

// TestTrackerRefreshWaitsForCommitInFlight starts a Refresh while a commit
// is stored but not yet applied. Reading the store then would count the
// commit twice: once in the read, once when its Apply is replayed. Refresh
// must instead wait for the commit to be applied before it fixes its
// snapshot.
func TestTrackerRefreshWaitsForCommitInFlight(t *testing.T) {
	ctx := context.Background()
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tf := newTraffic(t, s, 4)
	snapshots := make(chan struct{}, 1)
	wrapped := &snapshotHookStore{Store: s, taken: func() {
		select {
		case snapshots <- struct{}{}:
		default:
		}
	}}
	tr := newSorterTracker(t, wrapped)
	tr.SetClasses("parcel-sorter", sorterClasses)
	for range 10 {
		tf.batch(t, tr.Commit)
	}

	stored, proceed := make(chan struct{}), make(chan struct{})
	committed := make(chan error, 1)
	go func() {
		committed <- tr.Commit(func() (store.Changes, map[string]time.Time, error) {
			ch, latest, err := tf.predictions(ctx)
			close(stored)
			<-proceed // stored, not applied yet
			return ch, latest, err
		})
	}()
	<-stored
	refreshed := make(chan error, 1)
	go func() { refreshed <- tr.Refresh(ctx) }()
	// Refresh must not take its snapshot now. Waiting can only miss a
	// wrong snapshot taken later, never report a right one.
	select {
	case <-snapshots:
		t.Error("Refresh took its snapshot while a commit was stored but not applied")
	case <-time.After(200 * time.Millisecond):
	}
	close(proceed)
	if err := <-committed; err != nil {
		t.Fatal(err)
	}
	if err := <-refreshed; err != nil {
		t.Fatal(err)
	}
	checkAgainstStore(t, s, tr, "parcel-sorter")
}

// TestTrackerExactUnderRefresh runs several ingest lanes committing small
// batches through Tracker.Commit while Refresh runs in a loop and readers
// take views (run with -race). Every round stops the refresh loop first,
// so its last Refresh overlapped ingest, then stops ingest; the tracker
// must then equal the store's own sums at once, without another Refresh.
// A last Refresh with nothing in flight must keep them equal.
func TestTrackerExactUnderRefresh(t *testing.T) {
	t.Run("sqlite", func(t *testing.T) { testExactUnderRefresh(t, sqlitestoretest.Open(t, sqlitestore.Options{})) })
	t.Run("postgres", func(t *testing.T) {
		testExactUnderRefresh(t, pgstoretest.Open(t, pgtest.URL(t)))
	})
}

func testExactUnderRefresh(t *testing.T, s store.Store) {
	const (
		lanes  = 4
		rounds = 6
		// A round refreshes at least minRefreshes times and until the
		// lanes made minCommits commits.
		minRefreshes = 8
		minCommits   = 40
	)
	ctx := context.Background()
	model := "parcel-sorter"
	tr := newSorterTracker(t, s)
	tr.SetClasses(model, sorterClasses)
	lane := make([]*traffic, lanes)
	for i := range lane {
		lane[i] = newTraffic(t, s, uint64(100+i))
		lane[i].prefix = fmt.Sprintf("lane%d-", i)
		// Many small commits make a commit in flight at each Refresh likely.
		lane[i].maxPreds, lane[i].maxLabels = 3, 3
	}

	defer readViews(tr, model)()

	var commits atomic.Int64
	commit := func(txFunc func() (store.Changes, map[string]time.Time, error)) error {
		err := tr.Commit(txFunc)
		commits.Add(1)
		return err
	}
	for round := range rounds {
		stop := make(chan struct{})
		var ingest sync.WaitGroup
		for _, tf := range lane {
			ingest.Go(func() {
				for {
					select {
					case <-stop:
						return
					default:
					}
					if err := tf.commitBatch(ctx, commit); err != nil {
						t.Error(err)
						return
					}
				}
			})
		}
		start := commits.Load()
		// A lane that failed stops committing: leave the loop then too.
		for i := 0; (i < minRefreshes || commits.Load()-start < minCommits) && !t.Failed(); i++ {
			if err := tr.Refresh(ctx); err != nil {
				t.Error(err)
			}
		}
		close(stop)
		ingest.Wait()
		if t.Failed() {
			return
		}
		checkAgainstStore(t, s, tr, model)
		checkWatermark(t, s, tr, model)
		if t.Failed() {
			t.Fatalf("round %d: the tracker differs from the store after Refresh ran under ingest", round)
		}
	}
	if err := tr.Refresh(ctx); err != nil {
		t.Fatal(err)
	}
	checkAgainstStore(t, s, tr, model)
	checkWatermark(t, s, tr, model)
}

// readViews reads model's views in a loop until the returned function is
// called, which waits for the reader to stop.
func readViews(tr *windows.Tracker, model string) (stop func()) {
	done := make(chan struct{})
	var reader sync.WaitGroup
	reader.Go(func() {
		for {
			select {
			case <-done:
				return
			default:
			}
			for _, v := range tr.Views(model) {
				_ = v.Matrix.Total()
			}
		}
	})
	return func() {
		close(done)
		reader.Wait()
	}
}

// checkWatermark compares model's watermark in tr with the one the store's
// latest prediction time gives.
func checkWatermark(t *testing.T, s store.Store, tr *windows.Tracker, model string) {
	t.Helper()
	infos, err := s.Models(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	for _, info := range infos {
		if info.Name != model {
			continue
		}
		got, _ := tr.Watermark(model)
		if want := windows.Watermark(info.LatestAt, tr.Options(model).Bucket); !got.Equal(want) {
			t.Errorf("watermark %s, the store's latest prediction gives %s", got, want)
		}
		return
	}
	t.Errorf("the store does not list %s", model)
}

func TestTrackerWithoutStore(t *testing.T) {
	tr, err := windows.NewTracker(windows.TrackerOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.Load(context.Background()); err == nil {
		t.Error("Load without a store: no error")
	}
}

// BenchmarkTrackerMemory fills the rolling state of 50 models × 12 classes
// with traffic in every 5-minute bucket of the longest window's ten-day
// reach (2,880 buckets), a few labeled predictions per bucket touching a
// couple of cells, with now and then a late correction that moves a count
// from one cell to another. It reports the live heap the tracker holds
// after a full GC, which is what the daemon keeps resident between scrapes.
func BenchmarkTrackerMemory(b *testing.B) {
	const (
		models  = 50
		classes = 12
		buckets = 10 * 24 * 12 // ten days of 5m buckets
	)
	win := []windows.Window{
		{Name: "1h", Length: time.Hour},
		{Name: "1d", Length: 24 * time.Hour},
		{Name: "7d", Length: 7 * 24 * time.Hour},
		{Name: "3d-matured", Length: 3 * 24 * time.Hour, Lag: 7 * 24 * time.Hour},
	}
	names := make([]string, classes)
	for i := range names {
		names[i] = fmt.Sprintf("class-%02d", i)
	}
	fill := func() *windows.Tracker {
		tr, err := windows.NewTracker(windows.TrackerOptions{DefaultBucket: 5 * time.Minute, DefaultWindows: win})
		if err != nil {
			b.Fatal(err)
		}
		rng := rand.New(rand.NewPCG(3, 4))
		for m := range models {
			model := fmt.Sprintf("model-%02d", m)
			tr.SetClasses(model, names)
			for k := range buckets {
				bucket := t0.Add(time.Duration(k) * 5 * time.Minute)
				var ch store.Changes
				for range 1 + rng.IntN(4) {
					a, p := names[rng.IntN(classes)], names[rng.IntN(classes)]
					if rng.IntN(3) > 0 {
						a = p // most predictions are right
					}
					ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: bucket, Actual: a, Predicted: p, N: 1})
					ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: bucket, Predicted: p, N: 1})
				}
				if k > 12 && rng.IntN(10) == 0 {
					// A late correction an hour back: one prediction's
					// label moves from one actual class to another.
					late := bucket.Add(-time.Hour)
					p := names[rng.IntN(classes)]
					ch.Cells = append(ch.Cells,
						store.CellDelta{Model: model, Bucket: late, Actual: p, Predicted: p, N: -1},
						store.CellDelta{Model: model, Bucket: late, Actual: names[rng.IntN(classes)], Predicted: p, N: 1})
				}
				tr.Apply(ch, map[string]time.Time{model: bucket.Add(4 * time.Minute)})
			}
		}
		return tr
	}
	var heap uint64
	for b.Loop() {
		var before, after runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&before)
		tr := fill()
		runtime.GC()
		runtime.ReadMemStats(&after)
		heap = after.HeapAlloc - before.HeapAlloc
		runtime.KeepAlive(tr)
	}
	b.ReportMetric(float64(heap), "heap-bytes")
}
