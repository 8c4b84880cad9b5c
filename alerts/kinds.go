package alerts

import (
	"cmp"
	"context"
	"errors"
	"maps"
	"slices"
	"strings"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// Evaluator judges one rule for one model at one evaluation. Every rule
// kind has its own, built by the kind's constructor in the kinds table
// from the rule's checked settings; a rule of a kind not in the table is
// rejected when it is parsed or compiled, so no evaluation meets one.
type Evaluator interface {
	// Evaluate returns one Finding per alert instance of in.Model. An
	// error wrapping ErrNoWindow means the source does not know a window
	// the rule reads: a rule on all models skips that model.
	Evaluate(ctx context.Context, in Input) ([]Finding, error)
}

// Source is what an evaluation reads, all as known at the evaluation's
// time: the daemon reads the rolling tracker and the store; a backtest
// reads the history it replays.
type Source interface {
	// View returns a model's configured window; false when unknown.
	View(model, window string) (windows.View, bool)
	// Counts returns the per-bucket cells and predicted-class counts of a
	// range of buckets of one model.
	Counts(ctx context.Context, q store.Query) (store.Counts, error)
	// Watermark returns a model's watermark as its windows see it (README
	// "Join semantics and windows"); false when the model is unknown.
	Watermark(model string) (time.Time, bool)
}

// Input is one evaluation of one rule for one model.
type Input struct {
	Source Source
	Model  store.ModelInfo
	// At is the scheduled time of the evaluation.
	At time.Time
	// Confidence is the level the rule's tests and intervals use.
	Confidence float64
	// Since is when the evaluator started: a model that never sent a
	// prediction has had no traffic since then.
	Since time.Time
}

// Finding is one alert instance's result of one evaluation.
type Finding struct {
	Model, Class, Predicted string
	Result                  Result
}

// ErrNoWindow is returned when the source does not know a window a rule
// reads (the model is new, or the window is not configured for it).
var ErrNoWindow = errors.New("window unknown to the window source")

// badFunc reports a problem with one setting (its YAML key) of a rule.
type badFunc func(key, format string, args ...any)

// kindSpec is one rule kind's entry in the kinds table: the settings it
// takes, and how it is checked, evaluated and described.
type kindSpec struct {
	// keys are the YAML keys this kind takes beyond the common ones;
	// required those of them a config must set even where Go's zero
	// value would pass the kind's checks.
	keys, required []string
	// window: the kind reads a configured window (and takes the window
	// key);
	// reference: it compares with a reference period.
	window, reference bool
	// defaults fills in the kind's settings left out (may be nil).
	defaults func(r *Rule)
	// build checks the kind's settings, reporting each problem with bad,
	// and returns the evaluator. r is the compiled rule's own copy and
	// stays valid as long as the evaluator.
	build func(r *Rule, bad badFunc) Evaluator
	// lookback, when set, is how far before the watermark the kind reads
	// stored cells itself, beyond its windows (see Rule.Lookback).
	lookback func(r *Rule) time.Duration
	// checkWindows, when set, checks the configured windows the rule names
	// against what the kind needs of them (see CheckWindows).
	checkWindows func(r *Rule, ws []windows.Window) error
	// describe is the one-line summary of an alert of this kind with
	// known figures (see summary).
	describe func(a *Alert, subject string) string
}

// kinds is the table of rule kinds: adding a kind means adding its entry
// here and its evaluator in a file of its own.
var kinds = map[Kind]kindSpec{
	KindFloor: {
		keys: boundKeys, required: []string{"threshold"}, window: true,
		defaults: boundDefaults, build: newBound(false), describe: describeBound,
	},
	KindCeiling: {
		keys: boundKeys, required: []string{"threshold"}, window: true,
		defaults: boundDefaults, build: newBound(true), describe: describeBound,
	},
	KindDrop: {
		keys: []string{"metric", "classes", "margin", "reference"}, window: true, reference: true,
		defaults: func(r *Rule) { r.Metric = cmp.Or(r.Metric, "recall") },
		build:    newDrop, describe: describeDrop,
	},
	KindConfusionRise: {
		keys: []string{"pairs", "margin", "reference"}, window: true, reference: true,
		build: newConfusionRise, describe: describeConfusionRise,
	},
	KindPrevalenceShift: {
		keys: shiftKeys, window: true, reference: true,
		defaults: shiftDefaults, build: newShift(true), describe: describeShift("actual-class mix"),
	},
	KindOutputShift: {
		keys: shiftKeys, window: true, reference: true,
		defaults: shiftDefaults, build: newShift(false), describe: describeShift("predicted-class mix"),
	},
	KindEstimatedPrevalenceShift: {
		keys: []string{"classes", "margin", "reference"}, window: true, reference: true,
		build: newEstimatedShift, describe: describeEstimatedShift,
	},
	KindScoreShift: {
		keys: []string{"classes", "reference", "test", "threshold"}, window: true, reference: true,
		defaults: scoreShiftDefaults, build: newScoreShift, describe: describeScoreShift,
	},
	KindCUSUM: {
		keys: cusumKeys, lookback: func(r *Rule) time.Duration { return r.Lag + cusumHorizon }, checkWindows: checkCUSUMReference,
		defaults: cusumDefaults, build: newCUSUM, describe: describeCUSUM,
	},
	KindNoTraffic: {
		keys:  []string{"quiet_for"},
		build: newNoTraffic, describe: describeNoTraffic,
	},
}

// kindNames lists the kinds for messages, sorted.
func kindNames() string {
	return strings.Join(slices.Sorted(func(yield func(string) bool) {
		for k := range maps.Keys(kinds) {
			if !yield(string(k)) {
				return
			}
		}
	}), ", ")
}

// isKindKey reports whether k is a setting of some kind.
func isKindKey(k string) bool {
	if k == "window" {
		return true
	}
	for _, s := range kinds {
		if slices.Contains(s.keys, k) {
			return true
		}
	}
	return false
}
