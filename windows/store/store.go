// Package store declares classwatch's storage seam: the durable join of
// predictions with late labels, the per-bucket confusion cells it maintains,
// and the reads the daemon, the audit and the alert evaluator need.
//
// Two backends implement Store: pgstore (PostgreSQL, the production store)
// and sqlitestore (an embedded single file, the default). Both pass the one
// conformance suite in storetest.
//
// # Join semantics
//
// Every ingest call is one transaction: the raw rows, the predicted-class
// counts and the cell increments the batch causes commit together or not at
// all, so a caller may acknowledge a batch only after the call returned nil.
// Lines of a batch are applied as if one at a time, in order.
//
// A prediction is identified by (model, id). Its content is (predicted,
// segment, scores, at); a repeat with equal content is a duplicate, with
// different content a conflict (the first one stands). When the repeat's At
// was defaulted to the receive time (AtDefaulted), At is not compared, so a
// client retrying a line without "at" still gets "duplicate".
//
// A label is one version (actual, at) of a prediction's ground truth. Every
// distinct version is kept. The current label of a prediction is its real
// version with the greatest at (ties broken by the greater actual string, so
// the result does not depend on arrival order); an implied version (the
// model's default label applied after label_timeout) counts only while no
// real version exists. A cell (bucket, actual, predicted) counts the
// predictions whose current label is actual. Labels whose prediction is not
// yet known wait as early labels and join when it arrives.
//
// As of time T, a prediction's label is its latest real version with at ≤ T,
// else its implied version when that version's at ≤ T.
//
// # Score aggregates
//
// Predictions that carry scores also count in per-bucket score aggregates
// (ScoreCount, CalibrationCount, BrierSum), maintained like the cells:
// score histograms when the prediction is stored; calibration and Brier
// entries with its current label, in the same transaction, so a correction
// moves the prediction's entry from the old label to the new one, an
// implied or early label counts like any other, a duplicate changes
// nothing, and PurgeRaw keeps them. Predictions without scores count in
// none of them. Sums are kept as whole numbers of 1e-9 units (see Nano), so
// corrections and Verify are exact.
package store

import (
	"context"
	"errors"
	"math"
	"time"
)

// ErrUnavailable wraps failures to reach or commit to the database; callers
// answer 503 and the batch is not kept.
var ErrUnavailable = errors.New("store unavailable")

// ErrUnknownModel is returned by reads for a model the store has never seen.
var ErrUnknownModel = errors.New("unknown model")

// ErrLimit is returned for a batch that would pass a documented limit of
// the store (see the backend's package documentation). Nothing of the
// batch is kept, and the same batch fails the same way again: callers
// refuse it instead of asking for a retry.
var ErrLimit = errors.New("store limit exceeded")

// ErrTooManyClasses is returned by EnsureModel when registering would exceed
// the model's class limit.
var ErrTooManyClasses = errors.New("too many classes")

// Prediction is one logged model output.
type Prediction struct {
	Model string
	ID    string
	// At is the prediction's event time (UTC).
	At time.Time
	// AtDefaulted reports that At was not sent and was set to the receive
	// time; such a line is not compared on At when judging duplicates.
	AtDefaulted bool
	// Bucket is the start of the bucket holding At, computed by the caller
	// from the model's bucket width.
	Bucket    time.Time
	Predicted string
	// Scores are optional per-class scores, stored as sent.
	Scores  map[string]float64
	Segment string
}

// Label is one version of a prediction's ground truth.
type Label struct {
	Model  string
	ID     string
	Actual string
	// At is when this version became known (UTC); defaults to receive time.
	At time.Time
}

// PredictionOutcome is what happened to one prediction line.
type PredictionOutcome int

// Prediction outcomes.
const (
	PredictionStored    PredictionOutcome = iota // new (model, id): stored
	PredictionDuplicate                          // same content as the stored one: ignored
	PredictionConflict                           // different content: rejected, the first stands
)

// LabelOutcome is what happened to one label line.
type LabelOutcome int

// Label outcomes. The names match the result label of
// classwatch_labels_received_total.
const (
	LabelMatched   LabelOutcome = iota // first label of a known prediction: cell +1
	LabelEarly                         // prediction unknown yet: held as an early label
	LabelDuplicate                     // current label unchanged (version kept if new)
	LabelCorrected                     // current label changed: old cell −1, new cell +1
)

// String returns the metric label value of the outcome.
func (o LabelOutcome) String() string {
	switch o {
	case LabelMatched:
		return "matched"
	case LabelEarly:
		return "early"
	case LabelDuplicate:
		return "duplicate"
	case LabelCorrected:
		return "corrected"
	}
	return "unknown"
}

// CellDelta is a net change to one cell caused by a committed call, summed
// over segments.
type CellDelta struct {
	Model     string
	Bucket    time.Time
	Actual    string
	Predicted string
	N         int64
}

// PredictedDelta is a net change to one predicted-class count, summed over
// segments.
type PredictedDelta struct {
	Model     string
	Bucket    time.Time
	Predicted string
	N         int64
}

// ScoreDelta is a net change to one score histogram count, summed over
// segments.
type ScoreDelta struct {
	Model  string
	Bucket time.Time
	Class  string
	Bin    int
	N      int64
}

// CalibrationDelta is a net change to one calibration bin, summed over
// segments.
type CalibrationDelta struct {
	Model    string
	Bucket   time.Time
	Bin      int
	N        int64
	ScoreSum float64
	Correct  int64
}

// BrierDelta is a net change to one bucket's Brier sum, summed over
// segments.
type BrierDelta struct {
	Model  string
	Bucket time.Time
	N      int64
	Sum    float64
}

// Changes are the committed effects of a call, for callers that keep
// running sums (the rolling windows) in step with the store.
type Changes struct {
	Cells       []CellDelta
	Predicted   []PredictedDelta
	Scores      []ScoreDelta
	Calibration []CalibrationDelta
	Brier       []BrierDelta
}

// PredictionResult reports a committed prediction batch.
type PredictionResult struct {
	// Outcomes has one entry per input line, in input order.
	Outcomes []PredictionOutcome
	Changes  Changes
}

// LabelResult reports a committed label batch.
type LabelResult struct {
	// Outcomes has one entry per input line, in input order.
	Outcomes []LabelOutcome
	Changes  Changes
}

// Cell is one (bucket, actual, predicted) count summed over the selected
// segments.
type Cell struct {
	Bucket    time.Time
	Actual    string
	Predicted string
	N         int64
}

// PredictedCount is one (bucket, predicted) count of all predictions,
// labeled or not, summed over the selected segments.
type PredictedCount struct {
	Bucket    time.Time
	Predicted string
	N         int64
}

// ScoreBins is the number of equal-width score bins over [0, 1]: bin b holds
// scores in [b/10, (b+1)/10); the last bin also holds 1.
const ScoreBins = 10

// ScoreBin returns the bin of score s (s in [0, 1]); a score outside
// [0, 1] goes to the nearest end bin.
func ScoreBin(s float64) int {
	b := int(math.Floor(s * ScoreBins))
	return min(max(b, 0), ScoreBins-1)
}

// ScoreCount counts predictions that carry scores whose score for Class lies
// in Bin; a class missing from a prediction's scores counts as score 0.
// Predictions without scores count nowhere.
type ScoreCount struct {
	Bucket time.Time
	Class  string
	Bin    int
	N      int64
}

// CalibrationCount aggregates labeled predictions that carry scores by the bin of
// the predicted class's score (0 when missing): N, the sum of that score, and
// how many have current label == predicted.
type CalibrationCount struct {
	Bucket   time.Time
	Bin      int
	N        int64
	ScoreSum float64
	Correct  int64
}

// BrierSum aggregates labeled predictions that carry scores: N and the sum over them of
// Σ_k over the model's classes (s_k − 1[actual = k])², a missing s_k counting as 0.
type BrierSum struct {
	Bucket time.Time
	N      int64
	Sum    float64
}

// Query selects a model's buckets whose start lies in [From, To).
type Query struct {
	Model string
	From  time.Time
	To    time.Time
	// Segment, when non-nil, restricts the result to one segment.
	Segment *string
}

// Counts are the cells, predicted-class counts and score aggregates of a
// Query, ordered by bucket, then class names (Scores by class, then bin;
// Calibration by bin).
type Counts struct {
	Cells       []Cell
	Predicted   []PredictedCount
	Scores      []ScoreCount
	Calibration []CalibrationCount
	Brier       []BrierSum
}

// ModelInfo describes a registered model.
type ModelInfo struct {
	Name string
	// Classes in registration order; this order fixes matrix axes.
	Classes []string
	// LatestAt is the greatest prediction event time seen (zero if none).
	LatestAt time.Time
	// Predictions and Labeled count stored predictions and those with a
	// current label.
	Predictions int64
	Labeled     int64
}

// Difference is one count where the maintained value disagrees with the
// value recomputed from raw rows.
type Difference struct {
	Model string
	// Kind is "cell", "predicted", "score" (a score histogram count),
	// "calibration" or "brier".
	Kind      string
	Bucket    time.Time
	Segment   string
	Actual    string // Kind "cell" only
	Predicted string // Kind "cell" and "predicted"
	// Class and Bin address Kind "score" (Class) and "calibration" (Bin)
	// entries.
	Class string
	Bin   int
	// Measure names the figure that differs for Kind "calibration" ("n",
	// "score_sum", "correct", "brier") and "brier" ("n", "sum"); sums are
	// in 1e-9 units (see Nano).
	Measure   string
	Stored    int64
	Recounted int64
}

// AlertRecord is one alert's persisted state; the alerts package owns the
// meaning of State and Data.
type AlertRecord struct {
	// Key identifies the alert instance (rule, model, class, …).
	Key   string
	Rule  string
	Model string
	Class string
	State string
	// Data is the alerts package's JSON encoding of the rest.
	Data      []byte
	UpdatedAt time.Time
}

// Lease is a held single-evaluator lock.
type Lease interface {
	// Alive returns nil while the lock is still held.
	Alive(ctx context.Context) error
	// Release gives the lock up; calling it twice is harmless.
	Release(ctx context.Context) error
}

// Store is the storage seam. Implementations are safe for concurrent use by
// multiple goroutines.
type Store interface {
	// Migrate applies pending schema migrations; it refuses a database whose
	// schema is newer than this binary.
	Migrate(ctx context.Context) error
	// Ping checks that the database answers and is migrated.
	Ping(ctx context.Context) error
	Close() error

	// EnsureModel registers model (if new) and any of classes it does not
	// have yet, appended in the order given, and returns the model's full
	// class list. maxClasses > 0 caps the list: when new classes would pass
	// it, nothing is registered and ErrTooManyClasses is returned.
	EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error)
	Models(ctx context.Context) ([]ModelInfo, error)

	// IngestPredictions stores a batch in one transaction. now is the
	// receive time. Models and classes must already be registered.
	IngestPredictions(ctx context.Context, batch []Prediction, now time.Time) (PredictionResult, error)
	// IngestLabels applies a batch of label versions in one transaction.
	IngestLabels(ctx context.Context, batch []Label, now time.Time) (LabelResult, error)

	// ApplyLabelTimeout gives every stored prediction of model with no label
	// version and At+timeout ≤ now an implied version (actual = label,
	// at = At+timeout). It returns how many it labeled. A backend may
	// bound the work of one call (pgstore: the predictions of at most 32
	// days, see its package documentation) and leave the rest to later
	// calls; callers call it periodically.
	ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, Changes, error)
	// ExpireEarlyLabels drops early labels of model received at or before
	// now−ttl whose prediction never arrived, and returns how many.
	ExpireEarlyLabels(ctx context.Context, model string, ttl time.Duration, now time.Time) (int64, error)
	// PurgeRaw drops raw predictions of model in buckets starting before
	// cutoff, with their label versions; cells and counts stay.
	PurgeRaw(ctx context.Context, model string, cutoff time.Time) (int64, error)

	// Counts reads maintained cells and predicted-class counts.
	Counts(ctx context.Context, q Query) (Counts, error)
	// CountsAsOf recomputes the same figures from raw rows and label history
	// as known at asOf.
	CountsAsOf(ctx context.Context, q Query, asOf time.Time) (Counts, error)
	// Verify recomputes every cell and predicted count over the raw rows
	// still kept and returns each difference.
	Verify(ctx context.Context) ([]Difference, error)
	// LabelDelays counts, over the predictions of q made by asOf, the time
	// from each prediction's at to the at of its first real label version
	// known at asOf, binned by edges (ascending): out[i] counts delays d
	// with edges[i-1] ≤ d < edges[i], out[0] those below edges[0] and
	// out[len(edges)] those at or above the last edge. Implied versions and
	// unlabeled predictions are not counted.
	LabelDelays(ctx context.Context, q Query, asOf time.Time, edges []time.Duration) ([]int64, error)
	// LatestLabels returns, per model with a real label version, the
	// greatest at of those versions.
	LatestLabels(ctx context.Context) (map[string]time.Time, error)

	// SaveAlert upserts an alert's current state and, when history is true,
	// appends the record to the alert history, in one transaction.
	SaveAlert(ctx context.Context, rec AlertRecord, history bool) error
	// Alerts returns every alert's current state.
	Alerts(ctx context.Context) ([]AlertRecord, error)
	// AlertHistory returns history records updated in [from, to), newest
	// first, at most limit (0 = no limit).
	AlertHistory(ctx context.Context, from, to time.Time, limit int) ([]AlertRecord, error)

	// TryLead tries to take the named single-evaluator lock without
	// waiting. It returns a nil Lease and nil error when another holder has it.
	TryLead(ctx context.Context, name string) (Lease, error)

	// Snapshot runs readFunc with a SnapshotReader whose reads all come
	// from one read-only transaction, and so from one snapshot of the
	// database. The snapshot is fixed before fixedFunc is called: it holds
	// every commit that completed before Snapshot was called and no commit
	// that began after fixedFunc was called. A caller that keeps running
	// sums in step with its own commits (the rolling windows) holds its
	// commits back until fixedFunc and so knows exactly which of them the
	// snapshot holds. fixedFunc, when not nil, is called once, on the
	// calling goroutine, before readFunc, and not at all when the snapshot
	// cannot be taken. Snapshot returns readFunc's error as it is. The
	// reader is valid until readFunc returns and is not safe for
	// concurrent use.
	Snapshot(ctx context.Context, fixedFunc func(), readFunc func(r SnapshotReader) error) error

	// Events streams the history of q's predictions in time order (see
	// Event and EventQuery); the rule backtest replays it.
	Events(ctx context.Context, q EventQuery, fn func(*Event) error) error
}

// SnapshotReader reads one consistent snapshot of a store; see
// Store.Snapshot. Its methods mean what Store's methods of the same name
// mean, at the snapshot. Counts of a model registered after the snapshot
// was taken either finds nothing or fails with ErrUnknownModel.
type SnapshotReader interface {
	Models(ctx context.Context) ([]ModelInfo, error)
	Counts(ctx context.Context, q Query) (Counts, error)
}
