package api

import (
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"strconv"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// Audit is an audit report (README "Pages and the audit report"): the
// figures of one period, exactly as GET /v1/models/{model}/matrix answers
// the same query, with the evidence an auditor files beside them. Its JSON
// is what the HTML report embeds.
type Audit struct {
	Report
	// HistoryStep is the width of each History entry: a day, or an hour
	// or a bucket for short periods.
	HistoryStep string          `json:"history_step"`
	History     []PeriodFigures `json:"history"`
	LabelDelays LabelDelays     `json:"label_delays"`
	// AlertsFired are the alert history's firing records of the model
	// dated in the period, oldest first.
	AlertsFired []FiredAlert `json:"alerts_fired"`
	// Changes lists the cells that moved between AsOf and the time the
	// report was made; null when the report reads the labels known now.
	Changes *[]CellChange `json:"changed_since_as_of"`
	Verify  VerifyStatus  `json:"verify"`
	// Generated is when the report was made.
	Generated time.Time `json:"generated"`
	// Fingerprint is the SHA-256 of the RFC 8785 canonical JSON of the
	// fields named by FingerprintFields, in lowercase hex.
	Fingerprint string `json:"fingerprint"`
}

// FingerprintFields are the members of an Audit's JSON that its
// fingerprint covers: the figures, which a later report of the same query
// with as_of set to this one's as_of reproduces. What depends on the
// moment the report is made (alerts, changes, verify status, generated)
// is left out.
func FingerprintFields() []string {
	return []string{"model", "from", "to", "as_of", "segment", "classes", "matrix", "predictions", "labeled",
		"confidence", "metrics", "history_step", "history", "label_delays"}
}

// LabelDelays is the distribution of the time from a prediction to its
// first real label version known at the report's as-of time.
type LabelDelays struct {
	// Bins name the delay ranges; Counts has one entry per bin.
	Bins   []string `json:"bins"`
	Counts []int64  `json:"counts"`
	// WithoutRealLabel counts the period's predictions with no real label
	// version known then (unlabeled, or labeled only by the default after
	// the label timeout).
	WithoutRealLabel int64 `json:"without_real_label"`
}

// FiredAlert is one alert that entered the firing state in the period.
type FiredAlert struct {
	At        time.Time   `json:"at"`
	Rule      string      `json:"rule"`
	Class     string      `json:"class,omitempty"`
	Predicted string      `json:"predicted,omitempty"`
	Window    string      `json:"window,omitempty"`
	Metric    string      `json:"metric,omitempty"`
	Value     *float64    `json:"value"`
	Interval  *[2]float64 `json:"interval"`
	Threshold *float64    `json:"threshold"`
}

// CellChange is a matrix cell whose count moved after the as-of time.
type CellChange struct {
	Actual    string `json:"actual"`
	Predicted string `json:"predicted"`
	AsOf      int64  `json:"as_of"`
	Now       int64  `json:"now"`
}

// VerifyStatus compares the period's maintained cells with a recount from
// the raw rows and label history, as classwatch verify does for the whole
// store.
type VerifyStatus struct {
	// Status is "match", "differ" or "unverifiable" (raw rows purged).
	Status string `json:"status"`
	// Differences counts the (bucket, actual, predicted) cells and
	// (bucket, predicted) counts that differ.
	Differences int    `json:"differences"`
	Detail      string `json:"detail"`
}

// delayEdges bound the label-delay bins.
func delayEdges() []time.Duration {
	const day = 24 * time.Hour
	return []time.Duration{5 * time.Minute, time.Hour, 6 * time.Hour, day, 3 * day, 7 * day, 30 * day}
}

// recountAsOf is an as-of time after every event, so that a recount reads
// every label version.
func recountAsOf() time.Time { return time.Date(2200, 1, 1, 0, 0, 0, 0, time.UTC) }

// BuildAudit reads and computes the audit report of q. now is when the
// report is made (its as-of time when q has none). Errors are those of
// MatrixReport.
func BuildAudit(ctx context.Context, st store.Store, q MatrixQuery, now time.Time, confidence float64) (Audit, error) {
	now = now.UTC()
	p, err := readPeriod(ctx, st, q, now)
	if err != nil {
		return Audit{}, err
	}
	rep, err := p.report(confidence)
	if err != nil {
		return Audit{}, err
	}
	au := Audit{Report: rep, Generated: now, AlertsFired: []FiredAlert{}}
	step := historyStep(q.To.Sub(q.From), q.Bucket)
	au.HistoryStep = windows.FormatDuration(step)
	au.History = history(p.classes, p.counts, q.From, q.To, step, confidence)
	sq := store.Query{Model: q.Model, From: q.From, To: q.To, Segment: q.Segment}
	if err := au.readEvidence(ctx, st, sq, p); err != nil {
		return Audit{}, err
	}
	if err := au.readAlerts(ctx, st); err != nil {
		return Audit{}, err
	}
	au.Fingerprint, err = au.fingerprint()
	return au, err
}

// readEvidence fills the label delays, the changes since as-of and the
// verify status.
func (au *Audit) readEvidence(ctx context.Context, st store.Store, sq store.Query, p period) error {
	edges := delayEdges()
	counts, err := st.LabelDelays(ctx, sq, au.AsOf, edges)
	if err != nil {
		return fmt.Errorf("read label delays: %w", err)
	}
	au.LabelDelays = LabelDelays{Bins: delayBins(edges), Counts: counts, WithoutRealLabel: au.Predictions}
	for _, n := range counts {
		au.LabelDelays.WithoutRealLabel -= n
	}
	maintained := p.counts
	if p.q.AsOf != nil {
		if maintained, err = st.Counts(ctx, sq); err != nil {
			return fmt.Errorf("read current counts: %w", err)
		}
		m, _, err := windows.FromCounts(p.classes, maintained)
		if err != nil {
			return fmt.Errorf("sum current counts: %w", err)
		}
		changes := cellChanges(au.Classes, au.Matrix, m.Dense())
		au.Changes = &changes
	}
	recount, err := st.CountsAsOf(ctx, sq, recountAsOf())
	if err != nil {
		return fmt.Errorf("recount from raw rows: %w", err)
	}
	au.Verify = verifyCounts(maintained, recount)
	return nil
}

func (au *Audit) readAlerts(ctx context.Context, st store.Store) error {
	recs, err := st.AlertHistory(ctx, au.From, au.To, 0)
	if err != nil {
		return fmt.Errorf("read alert history: %w", err)
	}
	for _, v := range firedRecords(recs, au.Model) {
		au.AlertsFired = append(au.AlertsFired, FiredAlert{
			At: v.UpdatedAt.UTC(), Rule: v.Rule, Class: v.Class, Predicted: v.Predicted, Window: v.Window, Metric: v.Metric,
			Value: v.Result.Value, Interval: v.Result.Interval, Threshold: v.Result.Threshold,
		})
	}
	return nil
}

func delayBins(edges []time.Duration) []string {
	out := make([]string, 0, len(edges)+1)
	out = append(out, "<"+windows.FormatDuration(edges[0]))
	for i := 1; i < len(edges); i++ {
		out = append(out, windows.FormatDuration(edges[i-1])+"–"+windows.FormatDuration(edges[i]))
	}
	return append(out, "≥"+windows.FormatDuration(edges[len(edges)-1]))
}

// cellChanges lists the cells of then and now (same classes) that differ.
func cellChanges(classes []string, then, now [][]int64) []CellChange {
	out := []CellChange{}
	for a := range classes {
		for p := range classes {
			if then[a][p] != now[a][p] {
				out = append(out, CellChange{Actual: classes[a], Predicted: classes[p], AsOf: then[a][p], Now: now[a][p]})
			}
		}
	}
	return out
}

type countKey struct {
	bucket            int64
	actual, predicted string
	cell              bool
}

// verifyCounts compares maintained counts with a recount.
func verifyCounts(maintained, recount store.Counts) VerifyStatus {
	diff := map[countKey]int64{}
	var stored, recounted int64
	for _, c := range maintained.Cells {
		diff[countKey{c.Bucket.UnixMicro(), c.Actual, c.Predicted, true}] += c.N
	}
	for _, c := range recount.Cells {
		diff[countKey{c.Bucket.UnixMicro(), c.Actual, c.Predicted, true}] -= c.N
	}
	for _, c := range maintained.Predicted {
		diff[countKey{c.Bucket.UnixMicro(), "", c.Predicted, false}] += c.N
		stored += c.N
	}
	for _, c := range recount.Predicted {
		diff[countKey{c.Bucket.UnixMicro(), "", c.Predicted, false}] -= c.N
		recounted += c.N
	}
	n := 0
	for _, d := range diff {
		if d != 0 {
			n++
		}
	}
	switch {
	case n == 0:
		return VerifyStatus{Status: "match", Detail: "the maintained cells equal a recount from the raw predictions and label history"}
	case recounted == 0 && stored > 0:
		return VerifyStatus{Status: "unverifiable", Differences: n, Detail: "the raw rows of this period are no longer kept (retention); the cells cannot be recounted"}
	}
	return VerifyStatus{Status: "differ", Differences: n, Detail: strconv.Itoa(n) + " counts differ from a recount; run classwatch verify and see its report"}
}

// fingerprint hashes the canonical JSON of the FingerprintFields.
func (au Audit) fingerprint() (string, error) {
	data, err := json.Marshal(au)
	if err != nil {
		return "", fmt.Errorf("encode figures: %w", err)
	}
	var all map[string]json.RawMessage
	if err := json.Unmarshal(data, &all); err != nil {
		return "", fmt.Errorf("encode figures: %w", err)
	}
	keep := FingerprintFields()
	for k := range all {
		if !slices.Contains(keep, k) {
			delete(all, k)
		}
	}
	if data, err = json.Marshal(all); err != nil {
		return "", fmt.Errorf("encode figures: %w", err)
	}
	return Fingerprint(data)
}
