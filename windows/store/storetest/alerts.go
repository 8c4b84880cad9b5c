package storetest

import (
	"bytes"
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

func testAlerts(t *testing.T, s store.Store) {
	ctx := t.Context()
	rec := func(key, state string, updated time.Duration, data string) store.AlertRecord {
		return store.AlertRecord{Key: key, Rule: "recall-drop", Model: fraudModel, Class: strings.TrimPrefix(key, "recall-drop/card-fraud/"),
			State: state, Data: []byte(data), UpdatedAt: at(updated)}
	}
	fraudFiring := rec("recall-drop/card-fraud/fraud", "firing", 0, `{"recall":0.61}`)
	fraudResolved := rec("recall-drop/card-fraud/fraud", "resolved", time.Hour, `{"recall":0.83}`)
	legitPending := rec("recall-drop/card-fraud/legit", "pending", 30*time.Minute, `{"recall":0.97}`)
	fraudQuiet := rec("recall-drop/card-fraud/fraud", "resolved", 2*time.Hour, `{"recall":0.85}`)
	for _, step := range []struct {
		rec     store.AlertRecord
		history bool
	}{{fraudFiring, true}, {fraudResolved, true}, {legitPending, false}, {fraudQuiet, false}} {
		if err := s.SaveAlert(ctx, step.rec, step.history); err != nil {
			t.Fatalf("SaveAlert(%s): %v", step.rec.Key, err)
		}
	}
	got, err := s.Alerts(ctx)
	if err != nil {
		t.Fatalf("Alerts: %v", err)
	}
	slices.SortFunc(got, func(a, b store.AlertRecord) int { return strings.Compare(a.Key, b.Key) })
	wantRecords(t, "Alerts", got, []store.AlertRecord{fraudQuiet, legitPending})

	history := []struct {
		name     string
		from, to time.Duration
		limit    int
		want     []store.AlertRecord
	}{
		{"newest first", 0, 3 * time.Hour, 0, []store.AlertRecord{fraudResolved, fraudFiring}},
		{"to is exclusive", 0, time.Hour, 0, []store.AlertRecord{fraudFiring}},
		{"from is inclusive", time.Hour, 3 * time.Hour, 0, []store.AlertRecord{fraudResolved}},
		{"limit keeps the newest", 0, 3 * time.Hour, 1, []store.AlertRecord{fraudResolved}},
		{"empty range", 2 * time.Hour, 3 * time.Hour, 0, nil},
	}
	for _, h := range history {
		got, err := s.AlertHistory(ctx, at(h.from), at(h.to), h.limit)
		if err != nil {
			t.Fatalf("AlertHistory %s: %v", h.name, err)
		}
		wantRecords(t, "AlertHistory "+h.name, got, h.want)
	}
}

func wantRecords(t *testing.T, what string, got, want []store.AlertRecord) {
	t.Helper()
	same := slices.EqualFunc(got, want, func(a, b store.AlertRecord) bool {
		return a.Key == b.Key && a.Rule == b.Rule && a.Model == b.Model && a.Class == b.Class &&
			a.State == b.State && bytes.Equal(a.Data, b.Data) && a.UpdatedAt.Equal(b.UpdatedAt)
	})
	if !same {
		t.Errorf("%s:\n got  %s\n want %s", what, formatRecords(got), formatRecords(want))
	}
}

func formatRecords(rs []store.AlertRecord) string {
	var parts []string
	for _, r := range rs {
		parts = append(parts, fmt.Sprintf("{%s %s %s %s %s %s}", r.Key, r.Rule, r.Class, r.State, r.Data, r.UpdatedAt.UTC().Format(time.RFC3339)))
	}
	return "[" + strings.Join(parts, " ") + "]"
}

func testTryLead(t *testing.T, s store.Store) {
	ctx := t.Context()
	first, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || first == nil {
		t.Fatalf("TryLead on a free lock = %v, %v; want a lease", first, err)
	}
	if err := first.Alive(ctx); err != nil {
		t.Errorf("Alive of a held lease: %v", err)
	}
	second, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || second != nil {
		t.Errorf("TryLead while held = %v, %v; want nil, nil", second, err)
	}
	other, err := s.TryLead(ctx, "retention")
	if err != nil || other == nil {
		t.Fatalf("TryLead on another name = %v, %v; want a lease", other, err)
	}
	if err := first.Release(ctx); err != nil {
		t.Fatalf("Release: %v", err)
	}
	if err := first.Alive(ctx); err == nil {
		t.Errorf("Alive after Release = nil, want an error")
	}
	if err := first.Release(ctx); err != nil {
		t.Errorf("second Release: %v", err)
	}
	third, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || third == nil {
		t.Fatalf("TryLead after Release = %v, %v; want a lease", third, err)
	}
	if err := other.Alive(ctx); err != nil {
		t.Errorf("Alive of the other lease: %v", err)
	}
	if err := errors.Join(third.Release(ctx), other.Release(ctx)); err != nil {
		t.Errorf("Release: %v", err)
	}
}
