package storetest

import (
	"errors"
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// testLabelDelays checks the label-delay bins and the latest label time:
// first real versions count, later corrections and implied versions do
// not, asOf hides later versions, and the bins follow the edges.
func testLabelDelays(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	ensure(t, s, ticketModel, "billing", "tech")
	ingestPredictions(t, s, at(time.Hour),
		pred(fraudModel, "d1", at(0), "legit", "web"),
		pred(fraudModel, "d2", at(time.Minute), "fraud", "web"),
		pred(fraudModel, "d3", at(2*time.Minute), "legit", "pos"),
		pred(fraudModel, "d4", at(3*time.Minute), "legit", "web"),
		pred(fraudModel, "d5", at(4*time.Minute), "legit", "web"),
		pred(fraudModel, "d6", at(5*time.Minute), "legit", "web"), // implied only: not counted
	)
	ingestLabels(t, s, at(48*time.Hour),
		lab(fraudModel, "d1", "legit", at(30*time.Minute)),               // 30m
		lab(fraudModel, "d2", "fraud", at(time.Minute+2*time.Hour)),      // 2h
		lab(fraudModel, "d2", "legit", at(time.Minute+40*time.Hour)),     // correction: not the first
		lab(fraudModel, "d3", "fraud", at(2*time.Minute+30*time.Hour)),   // 30h
		lab(fraudModel, "d4", "legit", at(3*time.Minute+time.Hour)),      // exactly 1h: the 1h bin
		lab(fraudModel, "d5", "legit", at(4*time.Minute-10*time.Second)), // before the prediction: the lowest bin
	)
	if n, _, err := s.ApplyLabelTimeout(ctx, fraudModel, "legit", time.Minute, at(72*time.Hour)); err != nil || n != 1 {
		t.Fatalf("ApplyLabelTimeout = %d, %v; want 1 implied label", n, err)
	}
	edges := []time.Duration{time.Hour, 24 * time.Hour}
	got, err := s.LabelDelays(ctx, all(fraudModel), farFuture(), edges)
	if err != nil {
		t.Fatal(err)
	}
	if want := []int64{2, 2, 1}; !slices.Equal(got, want) {
		t.Errorf("LabelDelays = %v, want %v", got, want)
	}
	got, err = s.LabelDelays(ctx, all(fraudModel), at(3*time.Hour), edges)
	if err != nil {
		t.Fatal(err)
	}
	if want := []int64{2, 2, 0}; !slices.Equal(got, want) {
		t.Errorf("LabelDelays as of +3h = %v, want %v", got, want)
	}
	seg := "pos"
	q := all(fraudModel)
	q.Segment = &seg
	got, err = s.LabelDelays(ctx, q, farFuture(), edges)
	if err != nil {
		t.Fatal(err)
	}
	if want := []int64{0, 0, 1}; !slices.Equal(got, want) {
		t.Errorf("LabelDelays of segment pos = %v, want %v", got, want)
	}
	latest, err := s.LatestLabels(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if len(latest) != 1 || !latest[fraudModel].Equal(at(time.Minute+40*time.Hour)) {
		t.Errorf("LatestLabels = %v, want only %s: %s", latest, fraudModel, at(time.Minute+40*time.Hour))
	}
	if _, err := s.LabelDelays(ctx, all("no-such-model"), farFuture(), edges); !errors.Is(err, store.ErrUnknownModel) {
		t.Errorf("LabelDelays of an unknown model: %v, want ErrUnknownModel", err)
	}
}
