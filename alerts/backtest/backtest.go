// Package backtest replays alert rules over stored history, as the daemon
// would have evaluated them at each scheduled time, to show how often a
// rule would have paged before it is deployed (README "Rule backtest").
//
// At every time t in [From, To) at which a rule's cron schedule fires
// (UTC), the rule is evaluated by the alerts package's own evaluators and
// state machine (one alerts.Manager per rule and model) against windows as
// the daemon with "clock: wall" held them at t: predictions with at ≤ t,
// each under its latest label version with at ≤ t, an implied label only
// once its at ≤ t (the versions the store's label-timeout job stored).
// fire_after and resolve_after apply; nothing is notified or stored.
//
// The replay is one sweep per model over store.Store.Events in time order:
// each event updates a rolling windows.Tracker (the daemon's own window
// arithmetic) and per-bucket counts for fixed reference ranges, so an
// evaluation costs O(classes²) for a window and O(buckets) for a fixed
// range, never a recount of events, and memory grows with buckets, not
// with events.
package backtest

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/robfig/cron/v3"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// ErrInput marks a request the backtest cannot answer as asked: an empty
// or reversed time range, an unknown rule, or a replay that needs raw rows
// the store has purged.
var ErrInput = errors.New("bad backtest request")

// Options configure Run.
type Options struct {
	Store store.Store
	Rules []alerts.Rule
	// Tracker gives each model's bucket and windows, as the daemon
	// configures them; its Clock, Now and Store are ignored.
	Tracker windows.TrackerOptions
	// Windows are the configured windows every rule must name.
	Windows []windows.Window
	// Confidence is the daemon's confidence level (default 0.95).
	Confidence float64
	From, To   time.Time
	// Rule, when set, replays only the rule of that name.
	Rule string
}

// Report is the outcome of a replay.
type Report struct {
	From  time.Time    `json:"from"`
	To    time.Time    `json:"to"`
	Rules []RuleReport `json:"rules"`
}

// RuleReport is one rule's replay: how often it was evaluated and the
// episodes in which one of its alerts fired, in time order.
type RuleReport struct {
	Rule        string    `json:"rule"`
	Kind        string    `json:"kind"`
	Evaluations int       `json:"evaluations"`
	Episodes    []Episode `json:"episodes"`
}

// Episode is one firing of one alert instance; ResolvedAt is nil when it
// still fired at the end of the replay.
type Episode struct {
	Model      string     `json:"model"`
	Class      *string    `json:"class"`
	Predicted  *string    `json:"predicted"`
	FiringAt   time.Time  `json:"firing_at"`
	ResolvedAt *time.Time `json:"resolved_at"`
}

// FiringHours is the time the rule's alerts spent firing within [from, to),
// in hours, summed over episodes.
func (r RuleReport) FiringHours(to time.Time) float64 {
	var d time.Duration
	for _, e := range r.Episodes {
		end := to
		if e.ResolvedAt != nil {
			end = *e.ResolvedAt
		}
		d += end.Sub(e.FiringAt)
	}
	return d.Hours()
}

// PerThirtyDays is the rule's episodes per 30 days of the replayed span.
func (r RuleReport) PerThirtyDays(from, to time.Time) float64 {
	return float64(len(r.Episodes)) / (to.Sub(from).Hours() / (30 * 24))
}

// plan is one rule to replay.
type plan struct {
	rule     alerts.Rule
	schedule cron.Schedule
	report   *RuleReport
	// grain is the greatest common divisor of the rule's evaluation
	// times, in microseconds since the Unix epoch (0 for none).
	grain int64
}

// Run replays the rules. Errors wrapping ErrInput are the caller's to fix.
func Run(ctx context.Context, opts Options) (Report, error) {
	rep := Report{From: opts.From.UTC(), To: opts.To.UTC()}
	if !opts.From.Before(opts.To) {
		return rep, fmt.Errorf("--from %s is not before --to %s: %w", rep.From.Format(time.RFC3339), rep.To.Format(time.RFC3339), ErrInput)
	}
	plans, err := plansOf(opts, &rep)
	if err != nil {
		return rep, err
	}
	infos, err := opts.Store.Models(ctx)
	if err != nil {
		return rep, fmt.Errorf("list models: %w", err)
	}
	for _, p := range plans {
		if p.rule.Model != alerts.AllModels && !slices.ContainsFunc(infos, func(i store.ModelInfo) bool { return i.Name == p.rule.Model }) {
			return rep, fmt.Errorf("rule %s: model %s is not in the store", p.rule.Name, p.rule.Model)
		}
	}
	for _, info := range infos {
		var mine []*plan
		for _, p := range plans {
			if p.rule.Model == info.Name || p.rule.Model == alerts.AllModels {
				mine = append(mine, p)
			}
		}
		if len(mine) == 0 {
			continue
		}
		if err := replayModel(ctx, opts, info, mine); err != nil {
			return rep, fmt.Errorf("replay model %s: %w", info.Name, err)
		}
	}
	for i := range rep.Rules {
		slices.SortStableFunc(rep.Rules[i].Episodes, func(a, b Episode) int {
			return cmp.Or(a.FiringAt.Compare(b.FiringAt), cmp.Compare(a.Model, b.Model),
				cmp.Compare(deref(a.Class), deref(b.Class)), cmp.Compare(deref(a.Predicted), deref(b.Predicted)))
		})
	}
	return rep, nil
}

func deref(s *string) string {
	if s == nil {
		return ""
	}
	return *s
}

// plansOf selects the rules, parses their schedules and counts each one's
// evaluations in [From, To).
func plansOf(opts Options, rep *Report) ([]*plan, error) {
	var plans []*plan
	for _, r := range opts.Rules {
		if opts.Rule != "" && r.Name != opts.Rule {
			continue
		}
		spec := cmp.Or(r.Schedule, alerts.DefaultSchedule)
		s, err := cron.ParseStandard(spec)
		if err != nil {
			return nil, fmt.Errorf("rule %s: schedule %q: %w", r.Name, spec, err)
		}
		rep.Rules = append(rep.Rules, RuleReport{Rule: r.Name, Kind: string(r.Kind), Episodes: []Episode{}})
		plans = append(plans, &plan{rule: r, schedule: s})
	}
	if len(plans) == 0 {
		if opts.Rule != "" {
			return nil, fmt.Errorf("no rule named %q in the config: %w", opts.Rule, ErrInput)
		}
		return nil, fmt.Errorf("the config has no alert rules: %w", ErrInput)
	}
	for i, p := range plans {
		p.report = &rep.Rules[i]
		for t := first(p.schedule, opts.From); t.Before(opts.To); t = p.schedule.Next(t) {
			p.report.Evaluations++
			p.grain = gcd(p.grain, t.UnixMicro())
		}
	}
	return plans, nil
}

// first returns the schedule's first time at or after from. "@every D"
// schedules run at from, from + D, … (the daemon counts them from its
// start; the replay starts at from).
func first(s cron.Schedule, from time.Time) time.Time {
	from = from.UTC()
	if _, ok := s.(cron.ConstantDelaySchedule); ok {
		if t := from.Truncate(time.Second); t.Equal(from) {
			return t
		}
		return from.Truncate(time.Second).Add(time.Second)
	}
	return s.Next(from.Add(-time.Nanosecond))
}

// gcd returns the greatest common divisor of a and b, which are not
// negative; gcd(0, b) is b.
func gcd(a, b int64) int64 {
	for b != 0 {
		a, b = b, a%b
	}
	return a
}
