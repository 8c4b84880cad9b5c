package main

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/collector/sim"
)

// TestDemoEarlyRuleFiresFirst runs "classwatch demo" in-process, fast: 13
// simulated days at 10 simulated hours a second, the fraud wave on day
// nine. At that speed the rules run every second, every ten simulated
// hours as at the demo's default speed; faster, the one-second floor of a
// schedule spreads the evaluations wider and the two rules can fire at the
// same evaluation. The label-free estimated_prevalence_shift rule must fire
// after the wave began and before the recall drop rule, which waits for
// chargebacks (README.md "Early warning"); the story must say so.
func TestDemoEarlyRuleFiresFirst(t *testing.T) {
	if testing.Short() {
		t.Skip("replays 13 simulated days in about 30s of real time; skipped with -short")
	}
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	const days, speed = 13, 36000.0
	events := make(chan storyEvent, 16)
	var out lockedBuffer
	o := demoOptions{listen: "127.0.0.1:0", days: days, speed: speed, seed: 1,
		onEvent: func(e storyEvent) { events <- e }}
	started := time.Now().UTC().Truncate(time.Hour).Add(-days * 24 * time.Hour)
	done := make(chan error, 1)
	go func() { done <- playDemo(ctx, o, &out, &out) }()

	fired := map[string]storyEvent{}
	for fired[sim.EarlyRule].Rule == "" || fired[sim.RecallRule].Rule == "" {
		select {
		case e := <-events:
			fired[e.Rule] = e
			t.Logf("%5.1fs simulated %s: %s", e.Real.Seconds(), clock(e.Sim), e.Rule)
		case err := <-done:
			t.Fatalf("demo ended early: %v\n%s", err, out.String())
		case <-ctx.Done():
			t.Fatalf("the two card-screen rules did not both fire within 90s: %v\n%s", fired, out.String())
		}
	}
	cancel()
	if err := <-done; err != nil {
		t.Errorf("demo: %v", err)
	}
	early, recall := fired[sim.EarlyRule], fired[sim.RecallRule]
	// The start hour may have turned between the demo's clock and ours.
	drift := started.Add(sim.DefaultDriftAfter).Add(-time.Hour)
	if early.Sim.Before(drift) {
		t.Errorf("%s fired at simulated %s, before the wave at %s: a false alarm", sim.EarlyRule, clock(early.Sim), clock(drift))
	}
	if !early.Sim.Before(recall.Sim) || early.Real >= recall.Real {
		t.Errorf("%s fired at simulated %s (%.1fs), not before %s at %s (%.1fs)",
			sim.EarlyRule, clock(early.Sim), early.Real.Seconds(), sim.RecallRule, clock(recall.Sim), recall.Real.Seconds())
	} else if !strings.Contains(out.String(), "What happened: "+sim.EarlyRule) {
		t.Errorf("the story does not tell the early rule's lead:\n%s", out.String())
	}
}
