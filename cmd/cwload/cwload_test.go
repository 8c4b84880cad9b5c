package main

import (
	"cmp"
	"context"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
)

// TestQuickRun runs the harness end to end at a small size: it builds and
// starts the real daemon, pushes 20,000 predictions and their labels over
// HTTP and into the store, compares the daemon's counts and window
// matrices with the generator's recount, and scrapes a 50-model daemon,
// checking that every confusion cell is exported (README.md "Prometheus metrics"). It needs
// PostgreSQL and a few seconds, so it runs only with CLASSWATCH_LOADTEST=1:
//
//	CLASSWATCH_LOADTEST=1 go test -run TestQuickRun -v ./cmd/cwload/
//
// The server is CLASSWATCH_TEST_DATABASE_URL, else the local default.
// Speed is reported, never asserted.
func TestQuickRun(t *testing.T) {
	if os.Getenv("CLASSWATCH_LOADTEST") != "1" {
		t.Skip("set CLASSWATCH_LOADTEST=1 to run the load harness")
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	opts := defaultOptions()
	opts.DatabaseURL = cmp.Or(os.Getenv("CLASSWATCH_TEST_DATABASE_URL"), loadkit.DefaultDatabaseURL)
	opts.N = 20_000
	opts.LabelFraction = 0.9
	opts.scrapeEvents = 600
	opts.scrapes = 3
	var progress strings.Builder
	res, err := runHarness(ctx, opts, &progress)
	t.Log("\n" + progress.String())
	if res != nil {
		var report strings.Builder
		res.print(&report)
		t.Log("\n" + report.String())
	}
	if err != nil {
		t.Fatal(err)
	}

	p := res.Push
	if got, want := p.HTTPPredictions.Events, opts.N; got != want {
		t.Errorf("predictions pushed: got %d, want %d", got, want)
	}
	if got, want := p.HTTPLabels.Events, p.StoreLabels.Events; got != want {
		t.Errorf("labels pushed over HTTP: got %d, want the store phase's %d", got, want)
	}
	// 0.9 of 20,000 labeled, drawn per event: a count outside ±1,000
	// (over 20 standard deviations) means the fraction is not applied.
	if got := p.HTTPLabels.Events; got < 17_000 || got > 19_000 {
		t.Errorf("labels: got %d, want about 18,000", got)
	}
	if got, want := p.WindowsChecked, opts.Models*len(pushWindows()); got != want || !p.Checked {
		t.Errorf("windows checked: got %d (all held: %v), want %d", got, p.Checked, want)
	}
	if p.RSSEnd <= 0 || p.RSSHWM < p.RSSEnd {
		t.Errorf("daemon RSS: end %d, peak %d", p.RSSEnd, p.RSSHWM)
	}

	s := res.Scrape
	if got, want := len(s.Variants), 2; got != want {
		t.Fatalf("scrape variants: got %d, want %d", got, want)
	}
	for _, v := range s.Variants {
		if got, want := v.Confusion, 50*4*12*12; got != want {
			t.Errorf("scrape %s: got %d confusion samples, want %d", v.Name, got, want)
		}
	}
}

// TestScenarioDeterministic checks that an event depends on the seed and
// its indices alone, which lets the store and HTTP phases share events and
// the check recount them.
func TestScenarioDeterministic(t *testing.T) {
	end := time.Date(2026, 3, 2, 12, 0, 0, 0, time.UTC)
	zones := []zone{{share: 1, from: 6 * time.Hour, to: 0}}
	a := newScenario(7, "dock", 3, 6, 1000, end, zones, 0.5)
	b := newScenario(7, "dock", 3, 6, 1000, end, zones, 0.5)
	for _, idx := range [][2]int{{0, 0}, {2, 999}, {1, 500}} {
		ea, eb := a.event(idx[0], idx[1]), b.event(idx[0], idx[1])
		got := string(a.appendPrediction(nil, &ea)) + string(a.appendLabel(nil, &ea))
		want := string(b.appendPrediction(nil, &eb)) + string(b.appendLabel(nil, &eb))
		if got != want {
			t.Errorf("event %v differs between two scenarios of one seed:\n%s\n%s", idx, got, want)
		}
	}
	for j := range 1000 {
		e := a.event(1, j)
		if e.at.Before(end.Add(-6*time.Hour-time.Second)) || e.at.After(end) {
			t.Fatalf("event %d at %v, outside the 6h before %v", j, e.at, end)
		}
		if e.labeled && (e.labelAt.Before(e.at) || e.labelAt.After(end)) {
			t.Fatalf("event %d labeled at %v, not between %v and %v", j, e.labelAt, e.at, end)
		}
	}
}
