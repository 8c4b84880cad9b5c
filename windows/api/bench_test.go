package api_test

import (
	"context"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"net/url"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// benchClasses returns n class names of a fictional warehouse's parcel
// sorter.
func benchClasses(n int) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = fmt.Sprintf("lane-%02d", i)
	}
	return out
}

// fillStore writes perBucket predictions into every 5-minute bucket of
// [from, to) for model, 90% of them labeled within a day, about 80%
// correctly, in batches, and returns the store's model classes.
func fillStore(tb testing.TB, s store.Store, model string, classes []string, from, to time.Time, perBucket int, seed uint64) {
	tb.Helper()
	ctx := context.Background()
	if _, err := s.EnsureModel(ctx, model, classes, 0); err != nil {
		tb.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(seed, 3))
	var preds []store.Prediction
	var labels []store.Label
	flush := func(now time.Time) {
		if _, err := s.IngestPredictions(ctx, preds, now); err != nil {
			tb.Fatal(err)
		}
		if _, err := s.IngestLabels(ctx, labels, now); err != nil {
			tb.Fatal(err)
		}
		preds, labels = preds[:0], labels[:0]
	}
	n := 0
	for b := from; b.Before(to); b = b.Add(5 * time.Minute) {
		for range perBucket {
			actual := classes[min(rng.IntN(len(classes)), rng.IntN(len(classes)))] // skewed: low lanes common
			predicted := actual
			if rng.Float64() < 0.2 {
				predicted = classes[rng.IntN(len(classes))]
			}
			at := b.Add(time.Duration(rng.IntN(300)) * time.Second)
			id := fmt.Sprintf("p-%d", n)
			n++
			preds = append(preds, store.Prediction{Model: model, ID: id, At: at, Bucket: b, Predicted: predicted, Segment: "dock-a"})
			if rng.Float64() < 0.9 {
				labels = append(labels, store.Label{Model: model, ID: id, Actual: actual, At: at.Add(time.Duration(rng.IntN(86400)) * time.Second)})
			}
		}
		if len(preds) >= 4000 {
			flush(b)
		}
	}
	if len(preds) > 0 {
		flush(to)
	}
}

// BenchmarkAudit measures the audit report of one model with 12 classes
// over 90 days of 5-minute buckets (25,920 buckets, 3 predictions each)
// in the embedded SQLite store: end to end (every store read, figures and
// HTML) against the plain matrix read of the same query as the baseline of
// the same run, with labels as known now (maintained cells) and as of a
// time (recounted from the raw rows), and the rendering alone.
func BenchmarkAudit(b *testing.B) {
	s := sqlitestoretest.Open(b, sqlitestore.Options{})
	to := time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC)
	from := to.Add(-90 * 24 * time.Hour)
	fillStore(b, s, "parcel-sorter", benchClasses(12), from, to, 3, 1)
	asOf := to.Add(24 * time.Hour)
	ctx := context.Background()
	for _, v := range []struct {
		name string
		asOf *time.Time
	}{{"now", nil}, {"as-of", &asOf}} {
		q := api.MatrixQuery{Model: "parcel-sorter", From: from, To: to, Bucket: 5 * time.Minute, AsOf: v.asOf}
		b.Run(v.name+"/matrix-baseline", func(b *testing.B) {
			for b.Loop() {
				if _, err := api.MatrixReport(ctx, s, q, to, 0.95); err != nil {
					b.Fatal(err)
				}
			}
		})
		b.Run(v.name+"/report", func(b *testing.B) {
			for b.Loop() {
				au, err := api.BuildAudit(ctx, s, q, to, 0.95)
				if err != nil {
					b.Fatal(err)
				}
				if err := api.WriteAuditHTML(io.Discard, au); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
	au, err := api.BuildAudit(ctx, s, api.MatrixQuery{Model: "parcel-sorter", From: from, To: to, Bucket: 5 * time.Minute}, to, 0.95)
	if err != nil {
		b.Fatal(err)
	}
	b.Run("render-only", func(b *testing.B) {
		for b.Loop() {
			if err := api.WriteAuditHTML(io.Discard, au); err != nil {
				b.Fatal(err)
			}
		}
	})
}

// BenchmarkOverview measures GET / with 50 models × 12 classes × 4
// windows (two days of traffic each, in SQLite, windows held by the
// tracker) against GET /v1/models of the same daemon as the baseline.
func BenchmarkOverview(b *testing.B) {
	s := sqlitestoretest.Open(b, sqlitestore.Options{})
	to := time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC)
	for m := range 50 {
		fillStore(b, s, fmt.Sprintf("sorter-%02d", m), benchClasses(12), to.Add(-48*time.Hour), to, 1, uint64(m))
	}
	tr, err := windows.NewTracker(windows.TrackerOptions{
		Store:         s,
		DefaultBucket: 5 * time.Minute,
		DefaultWindows: []windows.Window{
			{Name: "1h", Length: time.Hour}, {Name: "6h", Length: 6 * time.Hour},
			{Name: "1d", Length: 24 * time.Hour}, {Name: "1d-matured", Length: 24 * time.Hour, Lag: 12 * time.Hour},
		},
	})
	if err != nil {
		b.Fatal(err)
	}
	if err := tr.Load(context.Background()); err != nil {
		b.Fatal(err)
	}
	mux := http.NewServeMux()
	api.New(api.Options{Store: s, Tracker: tr, Now: func() time.Time { return to.Add(time.Hour) }}).Register(mux)
	get := func(b *testing.B, path string) {
		for b.Loop() {
			rec := httptest.NewRecorder()
			mux.ServeHTTP(rec, httptest.NewRequest("GET", path, nil))
			if rec.Code != http.StatusOK {
				b.Fatalf("GET %s: %d", path, rec.Code)
			}
		}
	}
	b.Run("models-json-baseline", func(b *testing.B) { get(b, "/v1/models") })
	b.Run("overview", func(b *testing.B) { get(b, "/") })
	b.Run("model-page", func(b *testing.B) { get(b, "/models/"+url.PathEscape("sorter-07")) })
}
