package pgstore

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/migrations"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/storetest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// newStore returns a migrated store in a schema of its own.
func newStore(t *testing.T) *Store {
	t.Helper()
	return openStore(t, pgtest.URL(t), Options{})
}

func openStore(t *testing.T, url string, opts Options) *Store {
	t.Helper()
	s, err := Open(t.Context(), url, opts)
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	t.Cleanup(func() {
		if err := s.Close(); err != nil {
			t.Errorf("Close: %v", err)
		}
	})
	if err := s.Migrate(t.Context()); err != nil {
		t.Fatalf("Migrate: %v", err)
	}
	return s
}

func TestConformance(t *testing.T) {
	storetest.Exercise(t, func(t *testing.T) store.Store { return newStore(t) })
}

// TestMigrateConcurrently starts several stores on one new schema at once,
// as daemons starting together would: every Migrate succeeds and each
// version is applied once.
func TestMigrateConcurrently(t *testing.T) {
	base := pgtest.BaseURL(t)
	schema := fmt.Sprintf("cwtest_migrate_%d", time.Now().UnixNano())
	t.Cleanup(func() { dropSchema(t, base, schema) })
	stores := make([]*Store, 4)
	for i := range stores {
		s, err := Open(t.Context(), base, Options{Schema: schema})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { s.Close() })
		stores[i] = s
	}
	var wg sync.WaitGroup
	errs := make([]error, len(stores))
	for i, s := range stores {
		wg.Go(func() { errs[i] = s.Migrate(t.Context()) })
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Errorf("Migrate %d: %v", i, err)
		}
	}
	ms, err := migrations.List(migrations.Postgres)
	if err != nil {
		t.Fatal(err)
	}
	var rows, latest int
	if err := stores[0].pool.QueryRow(t.Context(), `SELECT count(*), max(version) FROM schema_version`).Scan(&rows, &latest); err != nil {
		t.Fatal(err)
	}
	if rows != len(ms) || latest != ms[len(ms)-1].Version {
		t.Errorf("schema_version has %d rows up to %d, want %d up to %d", rows, latest, len(ms), ms[len(ms)-1].Version)
	}
	for i, s := range stores {
		if err := s.Ping(t.Context()); err != nil {
			t.Errorf("Ping %d: %v", i, err)
		}
	}
}

// TestMigrateRefusesNewerSchema checks that a binary does not run against a
// schema written by a newer one.
func TestMigrateRefusesNewerSchema(t *testing.T) {
	s := newStore(t)
	latest, err := migrations.Latest(migrations.Postgres)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := s.pool.Exec(t.Context(), sqlRecordVersion, latest+1, "from_the_future"); err != nil {
		t.Fatal(err)
	}
	err = s.Migrate(t.Context())
	if err == nil || !strings.Contains(err.Error(), "newer than this binary") {
		t.Errorf("Migrate on a newer schema = %v, want a refusal", err)
	}
	if err := s.Ping(t.Context()); err == nil {
		t.Errorf("Ping on a newer schema = nil, want an error")
	}
}

// TestPingUnmigrated checks that Ping tells an empty database apart.
func TestPingUnmigrated(t *testing.T) {
	s, err := Open(t.Context(), pgtest.URL(t), Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Ping(t.Context()); !errors.Is(err, errNotMigrated) {
		t.Errorf("Ping before Migrate = %v, want %v", err, errNotMigrated)
	}
}

// TestUnavailable checks that a store that cannot reach its database
// reports store.ErrUnavailable, the callers' cue for 503.
func TestUnavailable(t *testing.T) {
	s, err := Open(t.Context(), "postgres://postgres@127.0.0.1:1/none?sslmode=disable&connect_timeout=2", Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	s.models["card-fraud"] = 1 // skip the lookup, so the ingest itself fails
	at := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	_, err = s.IngestPredictions(t.Context(), []store.Prediction{{Model: "card-fraud", ID: "t1", At: at, Bucket: at, Predicted: "fraud"}}, at)
	if !errors.Is(err, store.ErrUnavailable) {
		t.Errorf("IngestPredictions without a database = %v, want store.ErrUnavailable", err)
	}
	_, err = s.IngestLabels(t.Context(), []store.Label{{Model: "card-fraud", ID: "t1", Actual: "fraud", At: at}}, at)
	if !errors.Is(err, store.ErrUnavailable) {
		t.Errorf("IngestLabels without a database = %v, want store.ErrUnavailable", err)
	}
}

// TestPurgeDropsDays checks the retention path: a day whose every model
// purged past it loses its partitions, and a day another model still keeps
// loses only the purged model's rows.
func TestPurgeDropsDays(t *testing.T) {
	s := newStore(t)
	ctx := t.Context()
	for _, m := range []string{"card-fraud", "ticket-router"} {
		if _, err := s.EnsureModel(ctx, m, []string{"a", "b"}, 0); err != nil {
			t.Fatal(err)
		}
	}
	day1 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	day2 := day1.Add(24 * time.Hour)
	var preds []store.Prediction
	var labels []store.Label
	for _, m := range []string{"card-fraud", "ticket-router"} {
		for d, start := range []time.Time{day1, day2} {
			for i := range 3 {
				at := start.Add(time.Duration(i) * time.Hour)
				id := fmt.Sprintf("d%d-%d", d, i)
				preds = append(preds, store.Prediction{Model: m, ID: id, At: at, Bucket: at, Predicted: "a"})
				labels = append(labels, store.Label{Model: m, ID: id, Actual: "b", At: at.Add(time.Minute)})
			}
		}
	}
	if _, err := s.IngestPredictions(ctx, preds, day2); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestLabels(ctx, labels, day2); err != nil {
		t.Fatal(err)
	}
	exists := func(d time.Time) bool {
		var ok bool
		if err := s.pool.QueryRow(ctx, `SELECT to_regclass($1) IS NOT NULL`, partitionName(d)).Scan(&ok); err != nil {
			t.Fatal(err)
		}
		return ok
	}
	versions := func(m string) int {
		var n int
		if err := s.pool.QueryRow(ctx, `SELECT count(*) FROM label_versions v JOIN models m USING (model_id) WHERE m.name = $1`, m).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return n
	}
	if !exists(day1) || !exists(day2) {
		t.Fatalf("day partitions missing after ingest")
	}

	// card-fraud purges day 1: the day stays for ticket-router.
	n, err := s.PurgeRaw(ctx, "card-fraud", day2)
	if err != nil {
		t.Fatal(err)
	}
	if n != 3 {
		t.Errorf("PurgeRaw card-fraud = %d, want 3", n)
	}
	if !exists(day1) {
		t.Errorf("day 1 dropped while ticket-router still keeps it")
	}
	if got := versions("card-fraud"); got != 3 {
		t.Errorf("card-fraud label versions after purge = %d, want 3 (day 2)", got)
	}
	if got := versions("ticket-router"); got != 6 {
		t.Errorf("ticket-router label versions = %d, want 6", got)
	}

	// ticket-router purges day 1 too: now the day goes whole.
	if n, err := s.PurgeRaw(ctx, "ticket-router", day2); err != nil || n != 3 {
		t.Errorf("PurgeRaw ticket-router = %d, %v; want 3", n, err)
	}
	if exists(day1) {
		t.Errorf("day 1 kept after every model purged it")
	}
	if !exists(day2) {
		t.Errorf("day 2 dropped")
	}

	// A cutoff inside day 2 deletes rows but keeps the partition.
	if n, err := s.PurgeRaw(ctx, "card-fraud", day2.Add(90*time.Minute)); err != nil || n != 2 {
		t.Errorf("PurgeRaw inside a day = %d, %v; want 2", n, err)
	}
	if !exists(day2) {
		t.Errorf("day 2 dropped by a cutoff inside it")
	}
	if got := versions("card-fraud"); got != 1 {
		t.Errorf("card-fraud label versions = %d, want 1", got)
	}
	// A late prediction for the dropped day recreates its partition.
	late := store.Prediction{Model: "ticket-router", ID: "late", At: day1, Bucket: day1, Predicted: "a"}
	if _, err := s.IngestPredictions(ctx, []store.Prediction{late}, day2); err != nil {
		t.Fatal(err)
	}
	if _, err := s.IngestLabels(ctx, []store.Label{{Model: "ticket-router", ID: "late", Actual: "a", At: day2}}, day2); err != nil {
		t.Fatal(err)
	}
	diffs, err := s.Verify(ctx)
	if err != nil || len(diffs) > 0 {
		t.Errorf("Verify = %v, %v", diffs, err)
	}
}

// TestEarlyLabelRace sends every label at the same moment as its
// prediction, from concurrent goroutines and two stores (two daemons): no
// label may be left waiting for a prediction that is stored.
func TestEarlyLabelRace(t *testing.T) {
	url := pgtest.URL(t)
	stores := []*Store{openStore(t, url, Options{}), openStore(t, url, Options{})}
	ctx := t.Context()
	if _, err := stores[0].EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	const rounds, size = 40, 25
	start := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	var wg sync.WaitGroup
	errs := make(chan error, 2*rounds)
	for r := range rounds {
		var preds []store.Prediction
		var labels []store.Label
		for i := range size {
			id := fmt.Sprintf("r%d-%d", r, i)
			at := start.Add(time.Duration(r) * time.Minute)
			preds = append(preds, store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: at.Truncate(5 * time.Minute), Predicted: "legit"})
			labels = append(labels, store.Label{Model: "card-fraud", ID: id, Actual: "fraud", At: at.Add(time.Hour)})
		}
		wg.Go(func() {
			if _, err := stores[r%2].IngestPredictions(ctx, preds, start); err != nil {
				errs <- err
			}
		})
		wg.Go(func() {
			if _, err := stores[(r+1)%2].IngestLabels(ctx, labels, start); err != nil {
				errs <- err
			}
		})
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatalf("ingest: %v", err)
	}
	var waiting int
	if err := stores[0].pool.QueryRow(ctx, `SELECT count(*) FROM early_labels`).Scan(&waiting); err != nil {
		t.Fatal(err)
	}
	if waiting != 0 {
		t.Errorf("%d early labels wait for predictions that are stored", waiting)
	}
	ms, err := stores[1].Models(ctx)
	if err != nil || len(ms) != 1 {
		t.Fatalf("Models = %v, %v", ms, err)
	}
	if ms[0].Predictions != rounds*size || ms[0].Labeled != rounds*size {
		t.Errorf("Models totals = %d predictions, %d labeled; want %d of each", ms[0].Predictions, ms[0].Labeled, rounds*size)
	}
	diffs, err := stores[0].Verify(ctx)
	if err != nil || len(diffs) > 0 {
		t.Errorf("Verify = %v, %v", diffs, err)
	}
}

// TestEarlyLabelDuringPrediction holds a prediction batch open after it
// looked for early labels (the test locks a count row the batch must
// update), sends a label for one of its predictions meanwhile, then lets
// the batch commit: the label must join the prediction, not wait for it.
func TestEarlyLabelDuringPrediction(t *testing.T) {
	s := newStore(t)
	ctx := t.Context()
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	pred := func(id string) store.Prediction {
		return store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: at, Predicted: "legit"}
	}
	if _, err := s.IngestPredictions(ctx, []store.Prediction{pred("warm-up")}, at); err != nil {
		t.Fatal(err)
	}
	blocker, err := s.pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer blocker.Rollback(context.WithoutCancel(ctx))
	if _, err := blocker.Exec(ctx, `SELECT n FROM predicted_counts FOR UPDATE`); err != nil {
		t.Fatal(err)
	}

	predDone := make(chan error, 1)
	go func() {
		_, err := s.IngestPredictions(ctx, []store.Prediction{pred("txn-1")}, at)
		predDone <- err
	}()
	waitFor(t, s, "the prediction batch to wait for the count row", `wait_event_type = 'Lock' AND wait_event = 'transactionid'`)

	type labelResult struct {
		res store.LabelResult
		err error
	}
	labelDone := make(chan labelResult, 1)
	go func() {
		res, err := s.IngestLabels(ctx, []store.Label{{Model: "card-fraud", ID: "txn-1", Actual: "fraud", At: at}}, at)
		labelDone <- labelResult{res, err}
	}()
	// The label batch must wait for the prediction batch (on the early-label
	// lock); a broken store would instead hold the label as early and finish.
	var early *labelResult
	deadline := time.Now().Add(10 * time.Second)
	for early == nil && !waiting(t, s, `wait_event_type = 'Lock' AND wait_event = 'advisory'`) {
		select {
		case r := <-labelDone:
			early = &r
		case <-time.After(10 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			t.Fatalf("the label batch neither finished nor waited")
		}
	}
	if err := blocker.Rollback(ctx); err != nil {
		t.Fatal(err)
	}
	if err := <-predDone; err != nil {
		t.Fatalf("IngestPredictions: %v", err)
	}
	r := early
	if r == nil {
		got := <-labelDone
		r = &got
	}
	if r.err != nil {
		t.Fatalf("IngestLabels: %v", r.err)
	}
	if got := r.res.Outcomes[0]; got != store.LabelMatched {
		t.Errorf("label sent while its prediction was being stored: outcome %v, want matched", got)
	}
	c, err := s.Counts(ctx, store.Query{Model: "card-fraud", From: at, To: at.Add(time.Hour)})
	if err != nil {
		t.Fatal(err)
	}
	if len(c.Cells) != 1 || c.Cells[0].Actual != "fraud" || c.Cells[0].N != 1 {
		t.Errorf("cells = %+v, want one fraud/legit cell of 1", c.Cells)
	}
}

// waitFor polls pg_stat_activity until a backend of the test's database
// matches cond.
func waitFor(t *testing.T, s *Store, what, cond string) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !waiting(t, s, cond) {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

func waiting(t *testing.T, s *Store, cond string) bool {
	t.Helper()
	var n int
	if err := s.pool.QueryRow(t.Context(), `SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() AND `+cond).Scan(&n); err != nil {
		t.Fatal(err)
	}
	return n > 0
}

// TestLeaseLost checks that a lease notices the end of its session, and
// that the lock is then free for another daemon.
func TestLeaseLost(t *testing.T) {
	url := pgtest.URL(t)
	a, b := openStore(t, url, Options{}), openStore(t, url, Options{})
	ctx := t.Context()
	held, err := a.TryLead(ctx, "alert-evaluator")
	if err != nil || held == nil {
		t.Fatalf("TryLead = %v, %v", held, err)
	}
	if other, err := b.TryLead(ctx, "alert-evaluator"); err != nil || other != nil {
		t.Fatalf("TryLead from a second store while held = %v, %v; want nil, nil", other, err)
	}
	if err := held.Alive(ctx); err != nil {
		t.Fatalf("Alive while held: %v", err)
	}
	// End the lease's session, as a database restart or a network cut would.
	pid := held.(*lease).conn.Conn().PgConn().PID()
	if _, err := b.pool.Exec(ctx, `SELECT pg_terminate_backend($1)`, pid); err != nil {
		t.Fatal(err)
	}
	if err := held.Alive(ctx); err == nil {
		t.Errorf("Alive after the session ended = nil, want an error")
	}
	var taken store.Lease
	for range 50 { // the server frees the lock once the backend has exited
		if taken, err = b.TryLead(ctx, "alert-evaluator"); taken != nil || err != nil {
			break
		}
		time.Sleep(20 * time.Millisecond)
	}
	if err != nil || taken == nil {
		t.Fatalf("TryLead after the holder's session ended = %v, %v; want a lease", taken, err)
	}
	if err := held.Release(ctx); err != nil {
		t.Errorf("Release of a lost lease: %v", err)
	}
	if err := taken.Release(ctx); err != nil {
		t.Errorf("Release: %v", err)
	}
}

func dropSchema(t *testing.T, base, schema string) {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, base)
	if err != nil {
		t.Errorf("connect to drop schema: %v", err)
		return
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, "DROP SCHEMA IF EXISTS "+pgx.Identifier{schema}.Sanitize()+" CASCADE"); err != nil {
		t.Errorf("drop schema %s: %v", schema, err)
	}
}
