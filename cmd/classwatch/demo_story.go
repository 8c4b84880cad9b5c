package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"sync"
	"time"

	"github.com/classwatch/classwatch/collector/sim"
)

// storyEvent is one alert's first firing as the demo saw it.
type storyEvent struct {
	Rule, Model, Class, Severity string
	// Sim is the simulated time of the firing: the end of the window the
	// rule judged (the model's watermark), else (cusum) the simulation's
	// clock when the story saw it.
	Sim time.Time
	// Real is the wall time since the simulation began.
	Real time.Duration
	// Summary is the alert's figures in a few words.
	Summary string
}

// story follows the demo's alerts and tells what they mean: which rule
// fired when, and why the label-free one could see the fraud wave first
// (README.md "Early warning"). It is safe for concurrent use.
type story struct {
	out     io.Writer // shared with the progress lines; guarded by mu
	began   time.Time
	drift   time.Time // simulated time of the fraud wave
	onEvent func(storyEvent)

	mu      sync.Mutex
	simNow  time.Time
	driftIn time.Duration // real time at which the simulation reached drift; 0: not yet
	fired   map[string]storyEvent
	told    bool
}

func newStory(out io.Writer, began, drift time.Time, onEvent func(storyEvent)) *story {
	return &story{out: out, began: began, drift: drift, onEvent: onEvent, fired: map[string]storyEvent{}}
}

// printf writes one block of output, never interleaved with another.
func (s *story) printf(format string, args ...any) {
	s.mu.Lock()
	defer s.mu.Unlock()
	fmt.Fprintf(s.out, format, args...)
}

// progress notes the simulated clock, and says so when the wave begins.
func (s *story) progress(st sim.Stats) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.simNow = st.SimTime
	if s.driftIn == 0 && !st.SimTime.Before(s.drift) {
		s.driftIn = time.Since(s.began)
		fmt.Fprintf(s.out, "%6.1fs  simulated %s: a wave of a new fraud pattern hits card-screen's online payments.\n"+
			"         Its scores sit near the line and more payments are predicted fraud at once; the missed frauds'\n"+
			"         chargebacks come back a day or more later.\n", s.driftIn.Seconds(), clock(s.drift))
	}
}

// alertView is the part of GET /v1/alerts the story reads (README.md "HTTP API").
type alertView struct {
	Rule     string `json:"rule"`
	Kind     string `json:"kind"`
	Model    string `json:"model"`
	Class    string `json:"class"`
	Severity string `json:"severity"`
	State    string `json:"state"`
	Result   struct {
		To        time.Time `json:"to"`
		Value     *float64  `json:"value"`
		Count     int64     `json:"count"`
		Reference *struct {
			Value *float64 `json:"value"`
		} `json:"reference"`
	} `json:"result"`
}

// watch polls base's alerts every poll until ctx ends, telling each
// alert's first firing.
func (s *story) watch(ctx context.Context, client *http.Client, base string, poll time.Duration) {
	t := time.NewTicker(poll)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		var body struct {
			Alerts []alertView `json:"alerts"`
		}
		if err := getAlerts(ctx, client, base, &body); err != nil {
			continue // the daemon is starting or stopping; try again
		}
		for _, a := range body.Alerts {
			if a.State == "firing" {
				s.fire(a)
			}
		}
	}
}

func getAlerts(ctx context.Context, client *http.Client, base string, v any) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, base+"/v1/alerts", nil)
	if err != nil {
		return fmt.Errorf("build request: %w", err)
	}
	resp, err := client.Do(req)
	if err != nil {
		return fmt.Errorf("get alerts: %w", err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("get alerts: %s", resp.Status)
	}
	if err := json.NewDecoder(resp.Body).Decode(v); err != nil {
		return fmt.Errorf("decode alerts: %w", err)
	}
	return nil
}

// fire tells an alert's first firing, and the moral once both the early
// rule and the recall rule have fired.
func (s *story) fire(a alertView) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if _, ok := s.fired[a.Rule]; ok {
		return
	}
	ev := storyEvent{Rule: a.Rule, Model: a.Model, Class: a.Class, Severity: a.Severity,
		Sim: a.Result.To, Real: time.Since(s.began), Summary: summary(a)}
	if ev.Sim.IsZero() || a.Kind == "cusum" {
		// A cusum's chart ends its lag before the watermark.
		ev.Sim = s.simNow
	}
	s.fired[a.Rule] = ev
	fmt.Fprintf(s.out, "%6.1fs  simulated %s: %s fired (%s) on %s%s: %s\n",
		ev.Real.Seconds(), clock(ev.Sim), ev.Rule, ev.Severity, ev.Model, classSuffix(ev.Class), ev.Summary)
	if s.onEvent != nil {
		s.onEvent(ev)
	}
	early, ok1 := s.fired[sim.EarlyRule]
	recall, ok2 := s.fired[sim.RecallRule]
	if ok1 && ok2 && !s.told {
		s.told = true
		s.moral(early, recall)
	}
}

// moral explains the order of the two card-screen rules; s.mu is held.
func (s *story) moral(early, recall storyEvent) {
	if !early.Sim.Before(recall.Sim) {
		fmt.Fprintf(s.out, "\n%s fired no earlier than %s this time: the predicted mix moved too little "+
			"for the estimate to stand out before the chargebacks came back.\n\n", sim.EarlyRule, sim.RecallRule)
		return
	}
	fmt.Fprintf(s.out, `
What happened: %s fired %s after the wave began, %s of simulated time
(%.1fs of real time) before %s. It needs no label: it estimates card-screen's
fraud prevalence from the last day's predicted mix and the confusion matrix of %s, a day
old enough that all its labels are in (black-box shift estimation, README.md "Early warning").
The recall rule must wait for the chargebacks of the frauds the model missed. The estimate
assumes the model's errors stay as they were; the new pattern is caught less often, so it
understates the rise: a reason to look at segments and scores, not a measure of recall.
Monitoring is evidence, not validation.

`, sim.EarlyRule, hours(early.Sim.Sub(s.drift)), hours(recall.Sim.Sub(early.Sim)),
		(recall.Real - early.Real).Seconds(), sim.RecallRule, sim.MaturedWindow)
}

// summary is an alert's value against its reference, when both exist.
func summary(a alertView) string {
	r := a.Result
	switch {
	case r.Value != nil && r.Reference != nil && r.Reference.Value != nil:
		return fmt.Sprintf("%.4f against %.4f in the reference (n=%d)", *r.Value, *r.Reference.Value, r.Count)
	case r.Value != nil:
		return fmt.Sprintf("%.4g (n=%d)", *r.Value, r.Count)
	}
	return fmt.Sprintf("n=%d", r.Count)
}

func classSuffix(c string) string {
	if c == "" {
		return ""
	}
	return "/" + c
}

// clock formats a simulated time for the story.
func clock(t time.Time) string { return t.UTC().Format("2006-01-02 15:04") }

// hours formats a simulated span in hours.
func hours(d time.Duration) string { return fmt.Sprintf("%.0fh", d.Hours()) }
