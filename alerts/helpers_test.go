package alerts

import (
	"context"
	"log/slog"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// t0 is the tests' "now": the end of the current window.
var t0 = time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)

// binary is the class list of the fictional card-fraud model; fraud is the
// minority class.
var binary = []string{"legit", "fraud"}

// The windows the tests configure: the current day and a matured week
// ending three days before it.
var (
	dayWindow  = windows.Window{Name: "1d", Length: 24 * time.Hour}
	weekWindow = windows.Window{Name: "7d-matured", Length: 168 * time.Hour, Lag: 72 * time.Hour}
)

// views is the tests' window source: views set by hand, read through View
// as the rolling tracker's would be.
type views struct {
	mu sync.Mutex
	m  map[[2]string]windows.View
}

func newViews() *views { return &views{m: make(map[[2]string]windows.View)} }

func (v *views) View(model, window string) (windows.View, bool) {
	v.mu.Lock()
	defer v.mu.Unlock()
	view, ok := v.m[[2]string{model, window}]
	if ok {
		view.Matrix = view.Matrix.Clone()
	}
	return view, ok
}

// set installs a view of model's window with rows (actual × predicted over
// classes) and pred, the predicted-class counts of all predictions (nil:
// the column sums, every prediction labeled). Its bounds follow win at
// watermark t0.
func (v *views) set(tb testing.TB, model string, win windows.Window, classes []string, rows [][]int64, pred []int64) {
	tb.Helper()
	m := windows.NewMatrix(classes)
	for a, row := range rows {
		for p, n := range row {
			m.Add(a, p, n)
		}
	}
	if pred == nil {
		pred = make([]int64, len(classes))
		for k := range pred {
			pred[k] = m.Col(k)
		}
	}
	from, to := win.Bounds(t0)
	v.mu.Lock()
	defer v.mu.Unlock()
	v.m[[2]string{model, win.Name}] = windows.View{Model: model, Window: win, From: from, To: to, Watermark: t0, Matrix: m, Predicted: pred}
}

// binaryRows returns the matrix rows of a legit/fraud model.
func binaryRows(tn, fp, fn, tp int64) [][]int64 {
	return [][]int64{{tn, fp}, {fn, tp}}
}

// bundle is one test's store, windows and manager settings.
type bundle struct {
	path  string
	st    *sqlitestore.Store
	views *views
	reg   *prometheus.Registry
	now   *clock
}

// clock is a settable time source.
type clock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *clock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *clock) set(t time.Time) {
	c.mu.Lock()
	c.t = t
	c.mu.Unlock()
}

// setup opens a fresh store with the card-fraud model registered.
func setup(tb testing.TB) *bundle {
	tb.Helper()
	path := filepath.Join(tb.TempDir(), "classwatch.db")
	b := &bundle{path: path, st: sqlitestoretest.OpenAt(tb, path, sqlitestore.Options{RelaxedSync: true}), views: newViews(), reg: prometheus.NewRegistry(), now: &clock{t: t0}}
	tb.Cleanup(func() { b.st.Close() })
	if _, err := b.st.EnsureModel(context.Background(), "card-fraud", binary, 0); err != nil {
		tb.Fatalf("register model: %v", err)
	}
	return b
}

// options returns manager options over the bundle with rules.
func (b *bundle) options(rules ...Rule) Options {
	return Options{
		Store:        b.st,
		View:         b.views.View,
		Rules:        rules,
		Windows:      []windows.Window{dayWindow, weekWindow},
		Registerer:   b.reg,
		Logger:       testLogger(),
		Now:          b.now.Now,
		GeneratorURL: "http://classwatch.test:9640",
	}
}

func (b *bundle) manager(tb testing.TB, opts Options) *Manager {
	tb.Helper()
	m, err := New(opts)
	if err != nil {
		tb.Fatalf("New: %v", err)
	}
	return m
}

// reopen closes the store and opens the same file again, as a restarted
// daemon would, with a fresh metrics registry.
func (b *bundle) reopen(tb testing.TB) {
	tb.Helper()
	if err := b.st.Close(); err != nil {
		tb.Fatalf("close store: %v", err)
	}
	b.st = sqlitestoretest.OpenAt(tb, b.path, sqlitestore.Options{RelaxedSync: true})
	b.reg = prometheus.NewRegistry()
}

// instance returns the manager's in-memory instance of key (nil: none).
func (m *Manager) instanceOf(key string) *instance {
	m.mu.RLock()
	defer m.mu.RUnlock()
	if in, ok := m.instances[key]; ok {
		return in.clone()
	}
	return nil
}

func testLogger() *slog.Logger {
	if os.Getenv("CLASSWATCH_TEST_LOG") != "" {
		return slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelDebug}))
	}
	return slog.New(slog.DiscardHandler)
}

// evaluate runs m.Evaluate and fails the test on an error.
func evaluate(tb testing.TB, m *Manager, at time.Time) {
	tb.Helper()
	if err := m.Evaluate(context.Background(), at); err != nil {
		tb.Fatalf("Evaluate at %s: %v", at.Format(time.RFC3339), err)
	}
}

// waitFor waits until ch yields a value or fails the test after d.
func waitFor[T any](tb testing.TB, ch <-chan T, d time.Duration, what string) T {
	tb.Helper()
	select {
	case v := <-ch:
		return v
	case <-time.After(d):
		tb.Fatalf("timed out after %s waiting for %s", d, what)
		panic("unreachable")
	}
}
