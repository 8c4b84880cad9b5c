package lease

import (
	"context"
	"errors"
	"path/filepath"
	"testing"

	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// TestTwoReplicasPostgres runs two Leaders of one lock on two PostgreSQL
// stores, as two daemons would: one leads; when its process dies (its
// sessions end) the other takes over at its next Lead.
func TestTwoReplicasPostgres(t *testing.T) {
	url := pgtest.URL(t)
	ctx := context.Background()
	s1, s2 := pgstoretest.Open(t, url), pgstoretest.Open(t, url)
	var taken1, taken2 int
	var lost []error
	l1 := New(s1, "maintenance", Options{
		Acquired: func(context.Context) error { taken1++; return nil },
		Lost:     func(err error) { lost = append(lost, err) },
	})
	l2 := New(s2, "maintenance", Options{Acquired: func(context.Context) error { taken2++; return nil }})
	lead := func(l *Leader, want bool) {
		t.Helper()
		got, err := l.Lead(ctx)
		if err != nil || got != want || l.Held() != want {
			t.Fatalf("Lead = %v, %v (Held %v); want %v, nil", got, err, l.Held(), want)
		}
	}
	lead(l1, true)
	lead(l2, false)
	lead(l1, true) // kept, not taken again
	if taken1 != 1 || taken2 != 0 {
		t.Fatalf("Acquired ran %d and %d times; want 1 and 0", taken1, taken2)
	}
	s1.Close() // the first daemon dies: PostgreSQL frees its advisory lock
	lead(l2, true)
	if taken2 != 1 {
		t.Fatalf("second Acquired ran %d times; want 1", taken2)
	}
	if got, err := l1.Lead(ctx); got || err == nil || len(lost) != 1 || l1.Held() {
		t.Fatalf("dead replica: Lead = %v, %v, lost %v, Held %v; want false, an error, one loss", got, err, lost, l1.Held())
	}
	if err := l2.Release(ctx); err != nil {
		t.Fatal(err)
	}
	if err := l2.Release(ctx); err != nil || l2.Held() {
		t.Fatalf("second Release = %v, Held %v", err, l2.Held())
	}
}

// TestAcquiredFails checks that a Leader whose Acquired fails gives the
// lock back at once, so that another replica can take it.
func TestAcquiredFails(t *testing.T) {
	ctx := context.Background()
	st, err := sqlitestore.Open(ctx, filepath.Join(t.TempDir(), "cw.db"), sqlitestore.Options{RelaxedSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { st.Close() })
	boom := errors.New("cannot load state")
	sawHeld := false
	var bad *Leader
	bad = New(st, "alerts", Options{Acquired: func(context.Context) error { sawHeld = bad.Held(); return boom }})
	if got, err := bad.Lead(ctx); got || !errors.Is(err, boom) || bad.Held() || !sawHeld {
		t.Fatalf("Lead = %v, %v, Held %v, held during Acquired %v; want false, %v, false, true", got, err, bad.Held(), sawHeld, boom)
	}
	good := New(st, "alerts", Options{})
	if got, err := good.Lead(ctx); !got || err != nil {
		t.Fatalf("other replica: Lead = %v, %v; want the freed lock", got, err)
	}
	other := New(st, "maintenance", Options{})
	if got, err := other.Lead(ctx); !got || err != nil {
		t.Fatalf("another name: Lead = %v, %v; want it held too", got, err)
	}
}
