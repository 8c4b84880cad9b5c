package store

import (
	"errors"
	"time"
)

// ErrPurged is returned by Events when the raw rows it needs were dropped
// by PurgeRaw.
var ErrPurged = errors.New("raw rows purged")

// EventKind tells what an Event records.
type EventKind uint8

// Event kinds.
const (
	// EventPrediction: a prediction became known (its predicted-class
	// count counts from At on).
	EventPrediction EventKind = iota
	// EventLabel: a prediction's label as of At changed from Old to Actual
	// (cell (Old, Predicted) −1 unless Old is empty, cell (Actual,
	// Predicted) +1).
	EventLabel
)

// Event is one change to what was known about a model's predictions. It
// follows the package's as-of rule: from time T on, a prediction made at
// or before T counts under its latest real label version with at ≤ T, else
// under its implied version when that version's at ≤ T. So a label
// version's event comes at the later of its own at and its prediction's
// (an early label waits for its prediction), an implied version's only
// when no real version is older, and a version that leaves the label's
// class unchanged makes no event.
type Event struct {
	Kind EventKind
	// At is when the change became known.
	At time.Time
	// PredictionAt, Bucket, Segment and Predicted describe the prediction.
	PredictionAt time.Time
	Bucket       time.Time
	Segment      string
	Predicted    string
	// Scores are the prediction's scores, read only when EventQuery.Scores
	// is set (nil otherwise or when it has none).
	Scores map[string]float64
	// Old is the label in force just before At ("" for none) and Actual
	// the one from At on; Implied reports that Actual is the implied
	// version (the default label applied after label_timeout). Label
	// events only.
	Old, Actual string
	Implied     bool
	// Count is how many predictions the event stands for: 1, or more for
	// a grouped prediction event (see EventQuery.Step). Label events are
	// never grouped.
	Count int64
}

// EventQuery selects the events of a model's predictions whose bucket
// starts in [From, To) and that became known before Until. Implied labels
// are the versions stored by ApplyLabelTimeout, with their stored at
// (the prediction's at plus label_timeout), not derived from config.
type EventQuery struct {
	Model    string
	From, To time.Time
	Until    time.Time
	// Scores asks for each event's prediction scores.
	Scores bool
	// Step, when positive and Scores is unset, lets the store group the
	// prediction events of one (bucket, segment, predicted) whose ats lie
	// in the same step: the interval (k·Step − Step, k·Step] counted from
	// the Unix epoch. A group comes as one event with At = k·Step,
	// PredictionAt the latest of its ats and Count its size, so folding
	// the events up to any multiple of Step gives the same counts as
	// without grouping. A store may ignore Step.
	Step time.Duration
}
