package storetest

import (
	"errors"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

func testMigrateAndPing(t *testing.T, s store.Store) {
	ctx := t.Context()
	if err := s.Ping(ctx); err != nil {
		t.Fatalf("Ping on a migrated store: %v", err)
	}
	if err := s.Migrate(ctx); err != nil {
		t.Fatalf("second Migrate: %v", err)
	}
	if err := s.Ping(ctx); err != nil {
		t.Fatalf("Ping after a second Migrate: %v", err)
	}
	ms, err := s.Models(ctx)
	if err != nil {
		t.Fatalf("Models: %v", err)
	}
	if len(ms) != 0 {
		t.Errorf("a fresh store lists %d models, want 0", len(ms))
	}
}

func testEnsureModel(t *testing.T, s store.Store) {
	ctx := t.Context()
	steps := []struct {
		name    string
		model   string
		classes []string
		max     int
		want    []string // nil with tooMany
		tooMany bool
	}{
		{"new model keeps the order given", ticketModel, []string{"billing", "access"}, 0, []string{"billing", "access"}, false},
		{"new classes are appended once each", ticketModel, []string{"access", "outage", "outage", "refund"}, 0, []string{"billing", "access", "outage", "refund"}, false},
		{"passing the cap registers nothing", ticketModel, []string{"hardware", "shipping"}, 5, nil, true},
		{"reaching the cap exactly is allowed", ticketModel, []string{"hardware"}, 5, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"known classes under a lower cap", ticketModel, []string{"billing"}, 2, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"no classes returns the list", ticketModel, nil, 0, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"a new model past the cap is not registered", fraudModel, []string{"legit", "fraud", "unknown"}, 2, nil, true},
		{"a second model is separate", fraudModel, []string{"legit", "fraud"}, 2, []string{"legit", "fraud"}, false},
	}
	for _, st := range steps {
		got, err := s.EnsureModel(ctx, st.model, st.classes, st.max)
		if st.tooMany {
			if !errors.Is(err, store.ErrTooManyClasses) {
				t.Errorf("%s: error %v, want ErrTooManyClasses", st.name, err)
			}
			if st.model == fraudModel {
				// Nothing registered: the model is still unknown.
				if _, err := s.Counts(ctx, all(fraudModel)); !errors.Is(err, store.ErrUnknownModel) {
					t.Errorf("%s: Counts error %v, want ErrUnknownModel", st.name, err)
				}
			}
			continue
		}
		if err != nil {
			t.Fatalf("%s: %v", st.name, err)
		}
		if !slices.Equal(got, st.want) {
			t.Errorf("%s: classes %q, want %q", st.name, got, st.want)
		}
	}
	ms, err := s.Models(ctx)
	if err != nil {
		t.Fatalf("Models: %v", err)
	}
	slices.SortFunc(ms, func(a, b store.ModelInfo) int { return strings.Compare(a.Name, b.Name) })
	if len(ms) != 2 {
		t.Fatalf("Models lists %d models, want 2", len(ms))
	}
	wantModels := []store.ModelInfo{
		{Name: fraudModel, Classes: []string{"legit", "fraud"}},
		{Name: ticketModel, Classes: []string{"billing", "access", "outage", "refund", "hardware"}},
	}
	for i, w := range wantModels {
		g := ms[i]
		if g.Name != w.Name || !slices.Equal(g.Classes, w.Classes) || g.Predictions != 0 || g.Labeled != 0 || !g.LatestAt.IsZero() {
			t.Errorf("Models[%d] = %+v, want %+v", i, g, w)
		}
	}
}

func testUnknownModel(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	now := at(time.Hour)
	checks := map[string]error{}
	_, checks["Counts"] = s.Counts(ctx, all("no-such-model"))
	_, checks["CountsAsOf"] = s.CountsAsOf(ctx, all("no-such-model"), now)
	_, _, checks["ApplyLabelTimeout"] = s.ApplyLabelTimeout(ctx, "no-such-model", "legit", time.Hour, now)
	_, checks["ExpireEarlyLabels"] = s.ExpireEarlyLabels(ctx, "no-such-model", time.Hour, now)
	_, checks["PurgeRaw"] = s.PurgeRaw(ctx, "no-such-model", now)
	// A batch with one unregistered line is refused whole.
	_, checks["IngestPredictions"] = s.IngestPredictions(ctx, []store.Prediction{
		pred(fraudModel, "t1", at(0), "fraud", ""),
		pred("no-such-model", "t2", at(0), "fraud", ""),
	}, now)
	_, checks["IngestLabels"] = s.IngestLabels(ctx, []store.Label{
		lab(fraudModel, "t1", "fraud", at(0)),
		lab("no-such-model", "t2", "fraud", at(0)),
	}, now)
	for name, err := range checks {
		if !errors.Is(err, store.ErrUnknownModel) {
			t.Errorf("%s on an unknown model: error %v, want ErrUnknownModel", name, err)
		}
		if errors.Is(err, store.ErrUnavailable) {
			t.Errorf("%s on an unknown model: error %v claims the store is unavailable", name, err)
		}
	}
	wantCounts(t, "Counts after refused batches", counts(t, s, all(fraudModel)), store.Counts{})
	wantTotals(t, s, fraudModel, 0, 0, time.Time{})
	// The refused label batch kept no early label either: t1's prediction
	// arrives unlabeled.
	res := ingestPredictions(t, s, now, pred(fraudModel, "t1", at(0), "fraud", ""))
	wantChanges(t, res.Changes, nil, []store.PredictedDelta{predDelta(fraudModel, at(0), "fraud", 1)})
}
