package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/migrations"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/storetest"
)

// openTest opens and migrates a store on a new file under t.TempDir().
func openTest(t testing.TB, path string) *Store {
	t.Helper()
	ctx := context.Background()
	s, err := Open(ctx, path, Options{})
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	t.Cleanup(func() { s.Close() })
	if err := s.Migrate(ctx); err != nil {
		t.Fatalf("Migrate: %v", err)
	}
	return s
}

func TestConformance(t *testing.T) {
	storetest.Exercise(t, func(t *testing.T) store.Store {
		return openTest(t, filepath.Join(t.TempDir(), "classwatch.db"))
	})
}

func TestReopenKeepsCounts(t *testing.T) {
	ctx := t.Context()
	path := filepath.Join(t.TempDir(), "classwatch.db")
	s := openTest(t, path)
	b := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestPredictions(ctx, []store.Prediction{
		{Model: "card-fraud", ID: "t1", At: b, Bucket: b, Predicted: "fraud"},
		{Model: "card-fraud", ID: "t2", At: b, Bucket: b, Predicted: "legit"},
	}, b); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestLabels(ctx, []store.Label{{Model: "card-fraud", ID: "t1", Actual: "legit", At: b}}, b); err != nil {
		t.Fatal(err)
	}
	q := store.Query{Model: "card-fraud", From: b, To: b.Add(time.Hour)}
	want, err := s.Counts(ctx, q)
	if err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatalf("Close: %v", err)
	}

	s = openTest(t, path)
	if err := s.Ping(ctx); err != nil {
		t.Fatalf("Ping after reopen: %v", err)
	}
	got, err := s.Counts(ctx, q)
	if err != nil {
		t.Fatal(err)
	}
	if len(got.Cells) != 1 || got.Cells[0] != want.Cells[0] || len(got.Predicted) != 2 {
		t.Errorf("Counts after reopen = %+v, want %+v", got, want)
	}
	if got.Cells[0].Actual != "legit" || got.Cells[0].Predicted != "fraud" || got.Cells[0].N != 1 {
		t.Errorf("cell after reopen = %+v, want legit/fraud 1", got.Cells[0])
	}
	// The next label still sees the stored state: a correction, not a match.
	res, err := s.IngestLabels(ctx, []store.Label{{Model: "card-fraud", ID: "t1", Actual: "fraud", At: b.Add(time.Minute)}}, b)
	if err != nil {
		t.Fatal(err)
	}
	if res.Outcomes[0] != store.LabelCorrected {
		t.Errorf("label after reopen = %v, want corrected", res.Outcomes[0])
	}
}

func TestMigrateRefusesNewerSchema(t *testing.T) {
	ctx := t.Context()
	path := filepath.Join(t.TempDir(), "classwatch.db")
	s := openTest(t, path)
	latest, err := migrations.Latest(migrations.SQLite)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := s.write.ExecContext(ctx, sqlRecordVersion, latest+1, "from_the_future", 0); err != nil {
		t.Fatal(err)
	}
	err = s.Migrate(ctx)
	if err == nil {
		t.Fatal("Migrate on a newer database = nil, want an error")
	}
	if !strings.Contains(err.Error(), "newer") {
		t.Errorf("Migrate error %q does not say the database is newer", err)
	}
	if err := s.Ping(ctx); err == nil {
		t.Error("Ping on a newer database = nil, want an error")
	}
}

func TestPingUnmigrated(t *testing.T) {
	s, err := Open(t.Context(), filepath.Join(t.TempDir(), "classwatch.db"), Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Ping(t.Context()); err == nil {
		t.Error("Ping before Migrate = nil, want an error")
	}
}

// TestVerifyFindsDrift damages a maintained count behind the store's back
// and checks that Verify reports exactly that row.
func TestVerifyFindsDrift(t *testing.T) {
	ctx := t.Context()
	s := openTest(t, filepath.Join(t.TempDir(), "classwatch.db"))
	b := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestPredictions(ctx, []store.Prediction{{Model: "card-fraud", ID: "t1", At: b, Bucket: b, Predicted: "fraud", Segment: "web"}}, b); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestLabels(ctx, []store.Label{{Model: "card-fraud", ID: "t1", Actual: "fraud", At: b}}, b); err != nil {
		t.Fatal(err)
	}
	for _, q := range []string{
		`UPDATE cells SET n = n + 2`,
		`UPDATE predicted_counts SET n = 0`,
	} {
		if _, err := s.write.ExecContext(ctx, q); err != nil {
			t.Fatal(err)
		}
	}
	got, err := s.Verify(ctx)
	if err != nil {
		t.Fatal(err)
	}
	want := []store.Difference{
		{Model: "card-fraud", Kind: "cell", Bucket: b, Segment: "web", Actual: "fraud", Predicted: "fraud", Stored: 3, Recounted: 1},
		{Model: "card-fraud", Kind: "predicted", Bucket: b, Segment: "web", Predicted: "fraud", Stored: 0, Recounted: 1},
	}
	if len(got) != len(want) {
		t.Fatalf("Verify = %+v, want %+v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("Verify[%d] = %+v, want %+v", i, got[i], want[i])
		}
	}
}

// TestClosedStoreIsUnavailable checks that a failing database surfaces as
// store.ErrUnavailable, which the collector turns into a 503.
func TestClosedStoreIsUnavailable(t *testing.T) {
	ctx := t.Context()
	s := openTest(t, filepath.Join(t.TempDir(), "classwatch.db"))
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	s.Close()
	b := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	_, err := s.IngestPredictions(ctx, []store.Prediction{{Model: "card-fraud", ID: "t1", At: b, Bucket: b, Predicted: "fraud"}}, b)
	if !errors.Is(err, store.ErrUnavailable) {
		t.Errorf("IngestPredictions on a closed store: %v, want ErrUnavailable", err)
	}
	if !errors.Is(err, sql.ErrConnDone) && err != nil && !strings.Contains(err.Error(), "closed") {
		t.Errorf("IngestPredictions error %q hides the cause", err)
	}
}
