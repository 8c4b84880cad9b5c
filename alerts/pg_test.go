package alerts

import (
	"context"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// TestTakeOverPostgres runs two replicas on one PostgreSQL schema, as two
// daemons would: only the holder of the advisory lock evaluates; when its
// process dies (its sessions end), the other takes the lock at its next
// scheduled time, continues the firing alert without notifying it again,
// and later resolves it.
func TestTakeOverPostgres(t *testing.T) {
	url := pgtest.URL(t)
	ctx := context.Background()
	s1, s2 := pgstoretest.Open(t, url), pgstoretest.Open(t, url)
	if _, err := s1.EnsureModel(ctx, "card-fraud", binary, 0); err != nil {
		t.Fatal(err)
	}
	views := newViews()
	views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	h := newHook(t)
	replica := func(st Store) *Manager {
		m, err := New(Options{Store: st, View: views.View, Rules: []Rule{floorRule(1, 1)},
			Notifiers: []NotifierConfig{h.config()}, Logger: testLogger(), Now: func() time.Time { return t0 }})
		if err != nil {
			t.Fatal(err)
		}
		start(t, m)
		return m
	}
	m1, m2 := replica(s1), replica(s2)
	if !m1.leader.Held() || m2.leader.Held() {
		t.Fatalf("leaders: first %v, second %v; want only the first", m1.leader.Held(), m2.leader.Held())
	}
	evaluate(t, m1, t0)
	if a := h.next(t); a.State != StateFiring {
		t.Fatalf("notice %s, want firing", a.State)
	}
	// The first replica records the delivery just after the receiver
	// answered; dying before that would rightly send the notice again.
	waitNotified(t, s1, floorKey, h.config().Name, StateFiring)

	s1.Close() // the first daemon dies: PostgreSQL ends its sessions and frees the lock
	if !m2.lead(ctx) {
		t.Fatal("second replica did not take the lock of the dead one")
	}
	if in := m2.instanceOf(floorKey); in == nil || in.State != StateFiring || !in.StartsAt.Equal(t0) {
		t.Fatalf("taken over: %+v, want firing since %s", in, t0)
	}
	evaluate(t, m2, t0.Add(time.Minute))
	views.set(t, "card-fraud", dayWindow, binary, goodRecall, nil)
	evaluate(t, m2, t0.Add(2*time.Minute))
	if a := h.next(t); a.State != StateResolved || !a.StartsAt.Equal(t0) {
		t.Fatalf("notice after take-over: %s since %s, want resolved since %s (no second firing)", a.State, a.StartsAt, t0)
	}
}
