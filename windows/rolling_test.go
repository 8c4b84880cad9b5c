package windows_test

import (
	"fmt"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// t0 is an arbitrary bucket-aligned start for the scenarios below.
var t0 = time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)

// oracle remembers every delta ever applied and sums them over a window's
// bounds from scratch: the brute force the tracker's running sums must
// match.
type oracle struct {
	cells []store.CellDelta
	pred  []store.PredictedDelta
	ch    []store.Changes
}

func (o *oracle) add(ch store.Changes) {
	o.cells = append(o.cells, ch.Cells...)
	o.pred = append(o.pred, ch.Predicted...)
	o.ch = append(o.ch, ch)
}

// checkScores compares v's score aggregates with the oracle's sums. The
// test's float sums are multiples of 1/4, so every sum is exact.
func (o *oracle) checkScores(t *testing.T, v windows.View) {
	t.Helper()
	in := func(model string, b time.Time) bool {
		return model == v.Model && !b.Before(v.From) && b.Before(v.To)
	}
	want := windows.NewScoreSums(v.Matrix.Len())
	for _, ch := range o.ch {
		for _, d := range ch.Scores {
			if k, ok := v.Matrix.Index(d.Class); ok && in(d.Model, d.Bucket) {
				want.Hist[k][d.Bin] += d.N
			}
		}
		for _, d := range ch.Calibration {
			if in(d.Model, d.Bucket) {
				c := &want.Calib[d.Bin]
				c.N, c.ScoreSum, c.Correct = c.N+d.N, c.ScoreSum+d.ScoreSum, c.Correct+d.Correct
			}
		}
		for _, d := range ch.Brier {
			if in(d.Model, d.Bucket) {
				want.BrierN, want.BrierSum = want.BrierN+d.N, want.BrierSum+d.Sum
			}
		}
	}
	if !reflect.DeepEqual(v.Scores, want) {
		t.Fatalf("%s/%s scores %+v, want %+v", v.Model, v.Window.Name, *v.Scores, *want)
	}
}

// check compares v with the oracle's sums over [from, to), which the
// caller derives from the watermark it expects.
func (o *oracle) check(t *testing.T, v windows.View, from, to time.Time) {
	t.Helper()
	if !v.From.Equal(from) || !v.To.Equal(to) {
		t.Fatalf("%s/%s: bounds [%s, %s), want [%s, %s)", v.Model, v.Window.Name, v.From, v.To, from, to)
	}
	in := func(model string, b time.Time) bool {
		return model == v.Model && !b.Before(from) && b.Before(to)
	}
	want := make(map[[2]string]int64)
	for _, d := range o.cells {
		if in(d.Model, d.Bucket) {
			want[[2]string{d.Actual, d.Predicted}] += d.N
		}
	}
	wantPred := make(map[string]int64)
	for _, d := range o.pred {
		if in(d.Model, d.Bucket) {
			wantPred[d.Predicted] += d.N
		}
	}
	classes := v.Matrix.Classes()
	for a, actual := range classes {
		for p, predicted := range classes {
			if got, want := v.Matrix.At(a, p), want[[2]string{actual, predicted}]; got != want {
				t.Fatalf("%s/%s cell (%s, %s) = %d, want %d", v.Model, v.Window.Name, actual, predicted, got, want)
			}
			delete(want, [2]string{actual, predicted})
		}
		if got, want := v.Predicted[a], wantPred[actual]; got != want {
			t.Fatalf("%s/%s predicted %s = %d, want %d", v.Model, v.Window.Name, actual, got, want)
		}
		delete(wantPred, actual)
	}
	for k, n := range want {
		if n != 0 {
			t.Fatalf("%s/%s: cell %v = %d missing from the view's classes %v", v.Model, v.Window.Name, k, n, classes)
		}
	}
	for k, n := range wantPred {
		if n != 0 {
			t.Fatalf("%s/%s: predicted %s = %d missing from the view's classes %v", v.Model, v.Window.Name, k, n, classes)
		}
	}
}

// TestTrackerMatchesBruteForce applies random change sequences (late and
// out-of-range buckets, negative corrections, new classes, watermark jumps
// of every size) and checks after each one that every window equals the
// brute-force sum of all deltas over the window's bounds.
func TestTrackerMatchesBruteForce(t *testing.T) {
	defaults := []windows.Window{
		{Name: "15m", Length: 15 * time.Minute},
		{Name: "1h", Length: time.Hour},
		{Name: "30m-lag20m", Length: 30 * time.Minute, Lag: 20 * time.Minute},
	}
	sorterWindows := []windows.Window{
		{Name: "2h-lag1h", Length: 2 * time.Hour, Lag: time.Hour},
		{Name: "20m", Length: 20 * time.Minute},
	}
	buckets := map[string]time.Duration{"desk-router": 5 * time.Minute, "parcel-sorter": 10 * time.Minute}
	for seed := uint64(1); seed <= 25; seed++ {
		t.Run(fmt.Sprint("seed", seed), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, 99))
			tr, err := windows.NewTracker(windows.TrackerOptions{
				Models:         []windows.ModelOptions{{Name: "parcel-sorter", Bucket: 10 * time.Minute, Windows: sorterWindows, ReferenceWindow: "2h-lag1h"}},
				DefaultBucket:  5 * time.Minute,
				DefaultWindows: defaults,
			})
			if err != nil {
				t.Fatal(err)
			}
			classes := map[string][]string{"desk-router": {"billing", "outage"}, "parcel-sorter": {"intact", "damaged"}}
			for m, cs := range classes {
				tr.SetClasses(m, cs)
			}
			latest := map[string]time.Time{}
			var o oracle
			for step := 0; step < 150; step++ {
				var ch store.Changes
				moved := map[string]time.Time{}
				for _, model := range []string{"desk-router", "parcel-sorter"} {
					bucket := buckets[model]
					if rng.IntN(15) == 0 {
						classes[model] = append(classes[model], fmt.Sprintf("class%d", len(classes[model])))
						tr.SetClasses(model, classes[model])
					}
					cs := classes[model]
					base := latest[model]
					if base.IsZero() {
						base = t0
					}
					for range rng.IntN(6) {
						// Buckets from 5h before to 1h after the latest
						// prediction: some long gone, some not yet reached.
						b := windows.BucketStart(base, bucket).Add(time.Duration(rng.IntN(37)-30) * bucket)
						ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: b,
							Actual: cs[rng.IntN(len(cs))], Predicted: cs[rng.IntN(len(cs))], N: int64(rng.IntN(9) - 3)})
						ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: b,
							Predicted: cs[rng.IntN(len(cs))], N: int64(rng.IntN(5))})
						addScoreDeltas(rng, &ch, model, b, cs)
					}
					switch r := rng.IntN(10); {
					case r < 5:
						moved[model] = base.Add(time.Duration(rng.IntN(int(40 * time.Minute))))
					case r == 5:
						moved[model] = base.Add(time.Duration(rng.IntN(int(8 * time.Hour))))
					case r == 6:
						moved[model] = base.Add(-time.Hour) // an older prediction: no move
					}
				}
				o.add(ch)
				tr.Apply(ch, moved)
				for m, at := range moved {
					if at.After(latest[m]) {
						latest[m] = at
					}
				}
				for _, model := range []string{"desk-router", "parcel-sorter"} {
					if latest[model].IsZero() {
						continue
					}
					wm := windows.Watermark(latest[model], buckets[model])
					for _, v := range tr.Views(model) {
						if !slices.Equal(v.Matrix.Classes(), classes[model]) {
							t.Fatalf("%s classes %v, want %v", model, v.Matrix.Classes(), classes[model])
						}
						from, to := v.Window.Bounds(wm)
						o.check(t, v, from, to)
						o.checkScores(t, v)
						if model == "parcel-sorter" {
							ref, _ := tr.View(model, "2h-lag1h")
							if v.Reference == nil || !reflect.DeepEqual(v.Reference.Matrix, ref.Matrix) || !reflect.DeepEqual(v.Reference.Scores, ref.Scores) {
								t.Fatalf("%s/%s: reference is not window 2h-lag1h", model, v.Window.Name)
							}
						} else if v.Reference != nil {
							t.Fatalf("%s/%s: a reference without reference_window", model, v.Window.Name)
						}
					}
				}
			}
		})
	}
}

// addScoreDeltas appends random score aggregate changes for bucket b,
// negative ones included (corrections); float sums are multiples of 1/4.
func addScoreDeltas(rng *rand.Rand, ch *store.Changes, model string, b time.Time, classes []string) {
	n := int64(rng.IntN(5) - 1)
	bin := rng.IntN(store.ScoreBins)
	ch.Scores = append(ch.Scores, store.ScoreDelta{Model: model, Bucket: b, Class: classes[rng.IntN(len(classes))], Bin: bin, N: n})
	ch.Calibration = append(ch.Calibration, store.CalibrationDelta{Model: model, Bucket: b, Bin: bin, N: n, ScoreSum: float64(n) * 0.75, Correct: n / 2})
	ch.Brier = append(ch.Brier, store.BrierDelta{Model: model, Bucket: b, N: n, Sum: float64(n) * 0.25})
}

func TestTrackerLagWindow(t *testing.T) {
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultBucket:  5 * time.Minute,
		DefaultWindows: []windows.Window{{Name: "matured", Length: 30 * time.Minute, Lag: 15 * time.Minute}},
	})
	if err != nil {
		t.Fatal(err)
	}
	tr.SetClasses("claims", []string{"pay", "review"})
	cell := func(at time.Time, n int64) store.Changes {
		return store.Changes{Cells: []store.CellDelta{{Model: "claims", Bucket: at, Actual: "review", Predicted: "review", N: n}}}
	}
	// Latest prediction 12:57 → watermark 13:00 → window [12:15, 12:45).
	tr.Apply(cell(t0.Add(10*time.Minute), 1), map[string]time.Time{"claims": t0.Add(57 * time.Minute)}) // 12:10: before the window
	tr.Apply(cell(t0.Add(15*time.Minute), 2), nil)                                                      // 12:15: first bucket
	tr.Apply(cell(t0.Add(40*time.Minute), 4), nil)                                                      // 12:40: last bucket
	tr.Apply(cell(t0.Add(45*time.Minute), 8), nil)                                                      // 12:45: inside the lag
	v, ok := tr.View("claims", "matured")
	if !ok {
		t.Fatal("window matured missing")
	}
	if got, want := v.From, t0.Add(15*time.Minute); !got.Equal(want) {
		t.Errorf("from = %s, want %s", got, want)
	}
	if got, want := v.To, t0.Add(45*time.Minute); !got.Equal(want) {
		t.Errorf("to = %s, want %s", got, want)
	}
	if got, want := v.Matrix.At(1, 1), int64(2+4); got != want {
		t.Errorf("before the move: review/review = %d, want %d", got, want)
	}
	// Latest 13:10 → watermark 13:15 → [12:30, 13:00): 12:15 leaves, 12:45 enters.
	tr.Apply(store.Changes{}, map[string]time.Time{"claims": t0.Add(70 * time.Minute)})
	v, _ = tr.View("claims", "matured")
	if got, want := v.Matrix.At(1, 1), int64(4+8); got != want {
		t.Errorf("after the move: review/review = %d, want %d", got, want)
	}
	// A correction in the long-gone 12:10 bucket is ignored.
	tr.Apply(cell(t0.Add(10*time.Minute), -1), nil)
	v, _ = tr.View("claims", "matured")
	if got, want := v.Matrix.At(1, 1), int64(4+8); got != want {
		t.Errorf("after an out-of-range correction: review/review = %d, want %d", got, want)
	}
}

func TestTrackerWallClock(t *testing.T) {
	now := t0.Add(62 * time.Minute) // 13:02 → watermark 13:05
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultBucket:  5 * time.Minute,
		DefaultWindows: []windows.Window{{Name: "1h", Length: time.Hour}},
		Clock:          windows.ClockWall,
		Now:            func() time.Time { return now },
	})
	if err != nil {
		t.Fatal(err)
	}
	tr.SetClasses("tickets", []string{"billing", "outage"})
	// The latest prediction time does not move a wall-clock watermark.
	tr.Apply(store.Changes{
		Cells:     []store.CellDelta{{Model: "tickets", Bucket: t0.Add(5 * time.Minute), Actual: "outage", Predicted: "billing", N: 3}},
		Predicted: []store.PredictedDelta{{Model: "tickets", Bucket: t0.Add(5 * time.Minute), Predicted: "billing", N: 5}},
	}, map[string]time.Time{"tickets": t0.Add(5 * time.Hour)})
	v, _ := tr.View("tickets", "1h")
	if got, want := v.Watermark, t0.Add(65*time.Minute); !got.Equal(want) {
		t.Fatalf("watermark = %s, want %s", got, want)
	}
	if got, want := v.Matrix.At(1, 0), int64(3); got != want {
		t.Errorf("outage/billing = %d, want %d", got, want)
	}
	if got, want := v.Predicted[0], int64(5); got != want {
		t.Errorf("predicted billing = %d, want %d", got, want)
	}
	// Time passes without traffic: the 12:05 bucket leaves [12:10, 13:10).
	now = t0.Add(66 * time.Minute)
	v, _ = tr.View("tickets", "1h")
	if got, want := v.From, t0.Add(10*time.Minute); !got.Equal(want) {
		t.Errorf("from = %s, want %s", got, want)
	}
	if got, want := v.Matrix.Total(), int64(0); got != want {
		t.Errorf("total after the bucket left = %d, want %d", got, want)
	}
	if got, want := v.Predicted[0], int64(0); got != want {
		t.Errorf("predicted billing after the bucket left = %d, want %d", got, want)
	}
}

func TestTrackerGrowingClasses(t *testing.T) {
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultWindows: []windows.Window{{Name: "1h", Length: time.Hour}},
	})
	if err != nil {
		t.Fatal(err)
	}
	tr.SetClasses("line-7", []string{"ok", "dent"})
	at := map[string]time.Time{"line-7": t0}
	tr.Apply(store.Changes{Cells: []store.CellDelta{{Model: "line-7", Bucket: t0, Actual: "dent", Predicted: "ok", N: 2}}}, at)
	tr.SetClasses("line-7", []string{"ok", "dent", "scratch"})
	tr.Apply(store.Changes{Cells: []store.CellDelta{{Model: "line-7", Bucket: t0, Actual: "scratch", Predicted: "dent", N: 1}}}, nil)
	// A class the tracker was not told about is appended on sight.
	tr.Apply(store.Changes{Predicted: []store.PredictedDelta{{Model: "line-7", Bucket: t0, Predicted: "crack", N: 4}}}, nil)
	v, _ := tr.View("line-7", "1h")
	if got, want := v.Matrix.Classes(), []string{"ok", "dent", "scratch", "crack"}; !slices.Equal(got, want) {
		t.Fatalf("classes = %v, want %v", got, want)
	}
	want := [][]int64{{0, 0, 0, 0}, {2, 0, 0, 0}, {0, 1, 0, 0}, {0, 0, 0, 0}}
	for a, row := range want {
		for p, n := range row {
			if got := v.Matrix.At(a, p); got != n {
				t.Errorf("cell (%d, %d) = %d, want %d", a, p, got, n)
			}
		}
	}
	if got, want := v.Predicted, []int64{0, 0, 0, 4}; !slices.Equal(got, want) {
		t.Errorf("predicted = %v, want %v", got, want)
	}
}

func TestNewTrackerRejectsBadOptions(t *testing.T) {
	for name, opts := range map[string]windows.TrackerOptions{
		"unaligned window": {DefaultWindows: []windows.Window{{Name: "x", Length: 7 * time.Minute}}},
		"repeated window":  {DefaultWindows: []windows.Window{{Name: "x", Length: time.Hour}, {Name: "x", Length: 2 * time.Hour}}},
		"unknown clock":    {Clock: "lunar"},
		"model twice":      {Models: []windows.ModelOptions{{Name: "a"}, {Name: "a"}}},
		"unnamed model":    {Models: []windows.ModelOptions{{Bucket: time.Minute}}},
	} {
		if _, err := windows.NewTracker(opts); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
}
