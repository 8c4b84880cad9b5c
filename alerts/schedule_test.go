package alerts

import (
	"context"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
)

// TestScheduledJobMissed: a run that comes late evaluates at the latest
// scheduled time that has passed and counts the ones passed over.
func TestScheduledJobMissed(t *testing.T) {
	b := setup(t)
	r := floorRule(1, 1)
	r.Schedule = "*/5 * * * *"
	m := b.manager(t, b.options(r))
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	j := &scheduledJob{m: m, schedule: m.rules[0].schedule, rules: m.rules}
	j.next = j.schedule.Next(t0) // 12:05

	b.now.set(t0.Add(5*time.Minute + 30*time.Millisecond)) // on time
	j.run(context.Background())
	b.now.set(t0.Add(20*time.Minute + 2*time.Second)) // 12:10 and 12:15 passed over
	j.run(context.Background())

	missed := testutil.ToFloat64(m.metrics.missed.WithLabelValues(r.Name))
	last := testutil.ToFloat64(m.metrics.lastEvaluation)
	if missed != 2 || last != float64(t0.Add(20*time.Minute).Unix()) {
		t.Errorf("missed %g, last evaluation %s; want 2 and 12:20", missed, time.Unix(int64(last), 0).UTC())
	}
	if in := m.instanceOf(floorKey); in == nil || !in.StartsAt.Equal(t0.Add(5*time.Minute)) || !in.EvaluatedAt.Equal(t0.Add(20*time.Minute)) {
		t.Errorf("alert %+v, want firing since 12:05, evaluated at 12:20", in)
	}
	if !j.next.Equal(t0.Add(25 * time.Minute)) {
		t.Errorf("next scheduled time %s, want 12:25", j.next)
	}
}

// TestCronRuns: Start schedules the rules with cron and evaluates them on
// time (real clock, a one-second schedule).
func TestCronRuns(t *testing.T) {
	b := setup(t)
	r := floorRule(1, 1)
	r.Schedule = "@every 1s"
	opts := b.options(r)
	opts.Now = nil // cron runs on the real clock
	m := b.manager(t, opts)
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	start(t, m)
	deadline := time.Now().Add(10 * time.Second)
	for testutil.ToFloat64(m.metrics.evaluations.WithLabelValues(r.Name)) < 2 {
		if time.Now().After(deadline) {
			t.Fatal("cron did not evaluate twice within 10s")
		}
		time.Sleep(20 * time.Millisecond)
	}
	stop(t, m)
	in := m.instanceOf(floorKey)
	if in == nil || in.State != StateFiring || in.EvaluatedAt.Nanosecond() != 0 {
		t.Errorf("after cron runs: %+v, want firing, evaluated at a whole second", in)
	}
	if err := m.Stop(context.Background()); err != nil {
		t.Errorf("second Stop: %v", err)
	}
	if err := m.Start(context.Background()); err == nil {
		t.Error("Start after Stop = nil, want an error")
	}
}

func TestStopBeforeStart(t *testing.T) {
	b := setup(t)
	m := b.manager(t, b.options(floorRule(1, 1)))
	if err := m.Stop(context.Background()); err != nil {
		t.Errorf("Stop before Start: %v", err)
	}
}
