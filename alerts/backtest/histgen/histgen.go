// Package histgen generates the synthetic histories the rule backtest's
// measurement harness and benchmark replay: a fictional bank's card
// screen whose rare "fraud" class is confirmed by chargebacks over the
// following days (README "Rule backtest"). The figures are invented for
// measurement only.
package histgen

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Classes are the screen's classes, in registration order.
var Classes = []string{"legit", "fraud"}

// Spec describes one model's history.
type Spec struct {
	Model string
	// Start is the first hour; Hours how many hours follow.
	Start time.Time
	Hours int
	// PerHour predictions per hour, at uniform times within it.
	PerHour int
	// Prevalence is the share of frauds; Recall the share of frauds
	// predicted fraud, RecallAfter from ChangeAt on (zero ChangeAt: no
	// change); FalsePositive the share of legit payments predicted fraud.
	Prevalence, Recall, RecallAfter, FalsePositive float64
	ChangeAt                                       time.Time
	// LabelDelay: each fraud's label comes uniformly within this delay of
	// its prediction.
	LabelDelay time.Duration
	// LabelLegit also sends a label for each legitimate payment (same
	// delays); otherwise they are left to the model's default label.
	LabelLegit bool
	// Bucket is the store's bucket width.
	Bucket time.Duration
	Seed   uint64
}

// Trial is one fraud: when it was predicted, when its label came, and
// whether the model caught it.
type Trial struct {
	At, LabelAt time.Time
	Caught      bool
}

// Summary is what Ingest sent.
type Summary struct {
	Predictions, Labels int
	// Frauds are every fraud, in prediction-time order.
	Frauds []Trial
}

// Ingest generates spec's history and stores it in batches of batch lines,
// predictions first, then labels, each hour as one unit. The model must
// be registered with Classes.
func Ingest(ctx context.Context, st store.Store, spec Spec, batch int) (Summary, error) {
	rng := rand.New(rand.NewPCG(spec.Seed, 0x68697374))
	var (
		sum    Summary
		preds  []store.Prediction
		labels []store.Label
	)
	now := spec.Start.Add(time.Duration(spec.Hours)*time.Hour + spec.LabelDelay)
	flush := func(force bool) error {
		if len(preds) >= batch || (force && len(preds) > 0) {
			if _, err := st.IngestPredictions(ctx, preds, now); err != nil {
				return fmt.Errorf("ingest predictions: %w", err)
			}
			sum.Predictions += len(preds)
			preds = preds[:0]
		}
		if len(labels) >= batch || (force && len(labels) > 0) {
			if _, err := st.IngestLabels(ctx, labels, now); err != nil {
				return fmt.Errorf("ingest labels: %w", err)
			}
			sum.Labels += len(labels)
			labels = labels[:0]
		}
		return nil
	}
	for h := range spec.Hours {
		hour := spec.Start.Add(time.Duration(h) * time.Hour)
		for i := range spec.PerHour {
			at := hour.Add(time.Duration(rng.Int64N(int64(time.Hour))) / time.Millisecond * time.Millisecond)
			id := fmt.Sprintf("%d-%d", h, i)
			fraud := rng.Float64() < spec.Prevalence
			predicted := "legit"
			recall := spec.Recall
			if !spec.ChangeAt.IsZero() && !at.Before(spec.ChangeAt) {
				recall = spec.RecallAfter
			}
			switch {
			case fraud && rng.Float64() < recall, !fraud && rng.Float64() < spec.FalsePositive:
				predicted = "fraud"
			}
			preds = append(preds, store.Prediction{Model: spec.Model, ID: id, At: at, Bucket: at.Truncate(spec.Bucket), Predicted: predicted})
			if !fraud && !spec.LabelLegit {
				continue
			}
			labelAt := at.Add(time.Duration(rng.Int64N(int64(spec.LabelDelay))) / time.Millisecond * time.Millisecond)
			actual := "legit"
			if fraud {
				actual = "fraud"
				sum.Frauds = append(sum.Frauds, Trial{At: at, LabelAt: labelAt, Caught: predicted == "fraud"})
			}
			labels = append(labels, store.Label{Model: spec.Model, ID: id, Actual: actual, At: labelAt})
		}
		if err := flush(false); err != nil {
			return sum, err
		}
	}
	if err := flush(true); err != nil {
		return sum, err
	}
	// Within an hour times are drawn out of order.
	slices.SortStableFunc(sum.Frauds, func(a, b Trial) int { return a.At.Compare(b.At) })
	return sum, nil
}
