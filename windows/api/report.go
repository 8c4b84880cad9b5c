package api

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// RequestError is a query the caller got wrong: a missing or malformed
// parameter, a period not aligned to the model's buckets. The HTTP API
// answers it with 400.
type RequestError struct {
	Msg string
}

// Error returns the message.
func (e *RequestError) Error() string { return e.Msg }

func badRequest(format string, args ...any) error {
	return &RequestError{Msg: fmt.Sprintf(format, args...)}
}

// MatrixQuery selects one model's figures over a past period.
type MatrixQuery struct {
	Model string
	// From and To bound the buckets covered: starts in [From, To). Both
	// must be multiples of Bucket.
	From, To time.Time
	// Bucket is the model's bucket width.
	Bucket time.Duration
	// Segment, when non-nil, restricts the figures to one segment.
	Segment *string
	// AsOf, when non-nil, asks for the labels as known at that time instead
	// of the current ones.
	AsOf *time.Time
	// Reference, when non-nil, is the model's reference window that the
	// early-warning figures compare with (README.md "Early warning").
	Reference *windows.Reference
}

// Report is a model's confusion matrix and metrics over a period: the body
// of GET /v1/models/{model}/matrix and the output of classwatch audit.
type Report struct {
	Model string    `json:"model"`
	From  time.Time `json:"from"`
	To    time.Time `json:"to"`
	// AsOf is the as-of time asked for, or the time of the read when none
	// was: the figures use the labels known then.
	AsOf    time.Time `json:"as_of"`
	Segment *string   `json:"segment,omitempty"`
	Figures
}

// Figures are a matrix and its metrics, shared by period reports and
// window reports.
type Figures struct {
	// Classes orders both axes of Matrix: rows actual, columns predicted.
	Classes     []string  `json:"classes"`
	Matrix      [][]int64 `json:"matrix"`
	Predictions int64     `json:"predictions"`
	Labeled     int64     `json:"labeled"`
	// Confidence is the level of the Wilson intervals.
	Confidence float64       `json:"confidence"`
	Metrics    MetricFigures `json:"metrics"`
}

// MetricFigures are the metrics of windows.MetricDefs by name, computed
// from one matrix. A nil value is undefined: null in JSON, never 0. In JSON
// the window-scope metrics are fields of the object, beside "per_class"
// (see figures.go).
type MetricFigures struct {
	// Values holds every window-scope metric.
	Values map[string]*float64
	// PerClass holds every class's figures by class name.
	PerClass map[string]ClassFigures
	// Reliability holds the reliability bins of the labeled predictions
	// with scores; nil when the period's scores are unknown.
	Reliability []windows.ReliabilityBin
}

// ClassFigures are one class's figures; a nil value is undefined.
type ClassFigures struct {
	Support int64
	// Predictions counts the predictions of the class, labeled or not.
	Predictions int64
	// Values holds every class-scope metric by name.
	Values map[string]*float64
	// Intervals holds the confidence interval of every class-scope metric
	// that has one, by metric name (JSON "<name>_interval").
	Intervals map[string]*[2]float64
}

// MatrixReport reads and computes the figures of q from st. now is the
// read time, reported as as_of when q has none. It returns a *RequestError
// for a query at fault and wraps store.ErrUnknownModel for a model the
// store does not know.
func MatrixReport(ctx context.Context, st store.Store, q MatrixQuery, now time.Time, confidence float64) (Report, error) {
	p, err := readPeriod(ctx, st, q, now)
	if err != nil {
		return Report{}, err
	}
	return p.report(confidence)
}

// period is what MatrixReport reads: the counts of a query and the classes
// that order them.
type period struct {
	q       MatrixQuery
	asOf    time.Time
	classes []string
	counts  store.Counts
}

// readPeriod validates q and reads its counts: as of q.AsOf from the raw
// rows, else the maintained cells as of now.
func readPeriod(ctx context.Context, st store.Store, q MatrixQuery, now time.Time) (period, error) {
	infos, err := st.Models(ctx)
	if err != nil {
		return period{}, fmt.Errorf("list models: %w", err)
	}
	i := slices.IndexFunc(infos, func(m store.ModelInfo) bool { return m.Name == q.Model })
	if i < 0 {
		return period{}, fmt.Errorf("model %q: %w", q.Model, store.ErrUnknownModel)
	}
	if err := q.validate(); err != nil {
		return period{}, err
	}
	sq := store.Query{Model: q.Model, From: q.From, To: q.To, Segment: q.Segment}
	p := period{q: q, asOf: now.UTC()}
	if q.AsOf != nil {
		p.asOf = q.AsOf.UTC()
		p.counts, err = st.CountsAsOf(ctx, sq, p.asOf)
	} else {
		p.counts, err = st.Counts(ctx, sq)
	}
	if err != nil {
		return period{}, fmt.Errorf("read counts: %w", err)
	}
	// A class registered after the model list was read may appear in the
	// counts: append it rather than fail.
	p.classes = slices.Clone(infos[i].Classes)
	for _, c := range p.counts.Cells {
		p.classes = appendNew(p.classes, c.Actual, c.Predicted)
	}
	for _, c := range p.counts.Predicted {
		p.classes = appendNew(p.classes, c.Predicted)
	}
	for _, c := range p.counts.Scores {
		p.classes = appendNew(p.classes, c.Class)
	}
	return p, nil
}

// report sums the period's counts into its Report.
func (p period) report(confidence float64) (Report, error) {
	m, pred, err := windows.FromCounts(p.classes, p.counts)
	if err != nil {
		return Report{}, fmt.Errorf("sum counts: %w", err)
	}
	scores, err := windows.ScoresFromCounts(p.classes, p.counts)
	if err != nil {
		return Report{}, fmt.Errorf("sum counts: %w", err)
	}
	mt := windows.Compute(m, pred, confidence)
	windows.AddEarlyWarning(&mt, pred, scores, p.q.Reference.Aligned(p.classes), confidence)
	return Report{
		Model:   p.q.Model,
		From:    p.q.From.UTC(),
		To:      p.q.To.UTC(),
		AsOf:    p.asOf,
		Segment: p.q.Segment,
		Figures: FiguresOf(m, mt, confidence),
	}, nil
}

func appendNew(classes []string, names ...string) []string {
	for _, n := range names {
		if !slices.Contains(classes, n) {
			classes = append(classes, n)
		}
	}
	return classes
}

func (q MatrixQuery) validate() error {
	if q.Bucket <= 0 {
		return fmt.Errorf("matrix query for %s: bucket must be positive", q.Model)
	}
	bucket := windows.FormatDuration(q.Bucket)
	for _, b := range []struct {
		name string
		t    time.Time
	}{{"from", q.From}, {"to", q.To}} {
		if start := windows.BucketStart(b.t, q.Bucket); !start.Equal(b.t) {
			return badRequest("%s %s is not aligned to the %s buckets of model %s: use %s or %s",
				b.name, b.t.UTC().Format(time.RFC3339Nano), bucket, q.Model,
				start.Format(time.RFC3339), start.Add(q.Bucket).Format(time.RFC3339))
		}
	}
	if !q.To.After(q.From) {
		return badRequest("to %s must be after from %s", q.To.UTC().Format(time.RFC3339), q.From.UTC().Format(time.RFC3339))
	}
	return nil
}

// NewFigures computes the figures of matrix m with predicted-class counts
// pred (labeled or not) at the given confidence.
func NewFigures(m *windows.Matrix, pred []int64, confidence float64) Figures {
	return FiguresOf(m, windows.Compute(m, pred, confidence), confidence)
}

// FiguresOf returns the figures of matrix m whose metrics mt were computed
// at the given confidence (windows.Compute, View.Metrics).
func FiguresOf(m *windows.Matrix, mt windows.Metrics, confidence float64) Figures {
	f := Figures{
		Classes:     slices.Clone(m.Classes()),
		Matrix:      m.Dense(),
		Predictions: mt.Predictions,
		Labeled:     mt.Labeled,
		Confidence:  confidence,
		Metrics: MetricFigures{
			Values:   make(map[string]*float64),
			PerClass: make(map[string]ClassFigures, len(mt.PerClass)),
		},
	}
	defs := windows.MetricDefs()
	for k, cm := range mt.PerClass {
		cf := ClassFigures{
			Support:     cm.Support,
			Predictions: cm.PredictedCount,
			Values:      make(map[string]*float64),
			Intervals:   make(map[string]*[2]float64),
		}
		for _, d := range defs {
			if d.Scope != windows.ScopeClass {
				continue
			}
			cf.Values[d.Name] = d.Value(&mt, k)
			if d.Interval != nil {
				cf.Intervals[d.Name] = pair(d.Interval(&mt, k))
			}
		}
		f.Metrics.PerClass[cm.Class] = cf
	}
	for _, d := range defs {
		if d.Scope == windows.ScopeWindow {
			f.Metrics.Values[d.Name] = d.Value(&mt, 0)
		}
	}
	if mt.Scores != nil {
		f.Metrics.Reliability = mt.Scores.Reliability()
	}
	return f
}

func pair(iv *windows.Interval) *[2]float64 {
	if iv == nil {
		return nil
	}
	return &[2]float64{iv.Lo, iv.Hi}
}

// Report formats accepted by WriteReport.
const (
	FormatTable = "table"
	FormatJSON  = "json"
	FormatCSV   = "csv"
)

// WriteReport writes rep to w as "table" (aligned text for a terminal),
// "json" (the HTTP API's body, indented) or "csv" (one figure per row).
func WriteReport(w io.Writer, rep Report, format string) error {
	switch format {
	case FormatTable:
		return writeTable(w, rep)
	case FormatJSON:
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return fmt.Errorf("write report: %w", err)
		}
		return nil
	case FormatCSV:
		return writeCSV(w, rep)
	}
	return fmt.Errorf("unknown report format %q: want table, json or csv", format)
}

// num prints an optional figure with 4 decimals, "-" when undefined.
func num(v *float64) string {
	if v == nil {
		return "-"
	}
	return strconv.FormatFloat(*v, 'f', 4, 64)
}

func interval(iv *[2]float64) string {
	if iv == nil {
		return "-"
	}
	return fmt.Sprintf("[%.4f, %.4f]", iv[0], iv[1])
}

func writeTable(w io.Writer, rep Report) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	segment := "all"
	if rep.Segment != nil {
		segment = strconv.Quote(*rep.Segment)
	}
	mt := rep.Metrics
	ci := fmt.Sprintf("%g%% CI", 100*rep.Confidence)
	fmt.Fprintf(tw, "model\t%s\n", rep.Model)
	fmt.Fprintf(tw, "period\t[%s, %s)\n", rep.From.Format(time.RFC3339), rep.To.Format(time.RFC3339))
	fmt.Fprintf(tw, "labels as of\t%s\n", rep.AsOf.Format(time.RFC3339))
	fmt.Fprintf(tw, "segment\t%s\n", segment)
	fmt.Fprintf(tw, "predictions\t%d\n", rep.Predictions)
	fmt.Fprintf(tw, "labeled\t%d\n", rep.Labeled)
	defs := windows.MetricDefs()
	for _, d := range defs {
		if d.Scope == windows.ScopeWindow {
			fmt.Fprintf(tw, "%s\t%s\n", d.Title, num(mt.Values[d.Name]))
		}
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write report: %w", err)
	}

	fmt.Fprintf(w, "\nconfusion matrix (rows actual, columns predicted)\n")
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "actual\\predicted\t%s\t\n", strings.Join(rep.Classes, "\t"))
	for a, row := range rep.Matrix {
		cells := make([]string, len(row))
		for p, n := range row {
			cells[p] = strconv.FormatInt(n, 10)
		}
		fmt.Fprintf(tw, "%s\t%s\t\n", rep.Classes[a], strings.Join(cells, "\t"))
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write report: %w", err)
	}

	fmt.Fprintf(w, "\nper class (%s: Wilson score interval)\n", ci)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	head := []string{"class", "support", "predictions"}
	for _, d := range defs {
		if d.Scope == windows.ScopeClass {
			head = append(head, d.Title)
			if d.Interval != nil {
				head = append(head, d.Title+" "+ci)
			}
		}
	}
	fmt.Fprintln(tw, strings.Join(head, "\t"))
	for _, c := range rep.Classes {
		cf := mt.PerClass[c]
		cols := []string{c, strconv.FormatInt(cf.Support, 10), strconv.FormatInt(cf.Predictions, 10)}
		for _, d := range defs {
			if d.Scope == windows.ScopeClass {
				cols = append(cols, num(cf.Values[d.Name]))
				if d.Interval != nil {
					cols = append(cols, interval(cf.Intervals[d.Name]))
				}
			}
		}
		fmt.Fprintln(tw, strings.Join(cols, "\t"))
	}
	if err := tw.Flush(); err != nil {
		return fmt.Errorf("write report: %w", err)
	}
	return nil
}

// writeCSV writes one row per figure, every row repeating the period so
// that reports can be concatenated. Undefined figures have an empty value.
func writeCSV(w io.Writer, rep Report) error {
	cw := csv.NewWriter(w)
	segment := ""
	if rep.Segment != nil {
		segment = *rep.Segment
	}
	head := []string{rep.Model, rep.From.Format(time.RFC3339), rep.To.Format(time.RFC3339), rep.AsOf.Format(time.RFC3339Nano), segment}
	rows := [][]string{{"model", "from", "to", "as_of", "segment", "kind", "class", "predicted", "metric", "value"}}
	row := func(kind, class, predicted, metric, value string) {
		rows = append(rows, append(slices.Clone(head), kind, class, predicted, metric, value))
	}
	opt := func(v *float64) string {
		if v == nil {
			return ""
		}
		return strconv.FormatFloat(*v, 'g', -1, 64)
	}
	count := func(n int64) string { return strconv.FormatInt(n, 10) }
	mt := rep.Metrics
	row("summary", "", "", "predictions", count(rep.Predictions))
	row("summary", "", "", "labeled", count(rep.Labeled))
	row("summary", "", "", "confidence", opt(&rep.Confidence))
	defs := windows.MetricDefs()
	for _, d := range defs {
		if d.Scope == windows.ScopeWindow {
			row("summary", "", "", d.Name, opt(mt.Values[d.Name]))
		}
	}
	for a, r := range rep.Matrix {
		for p, n := range r {
			row("matrix", rep.Classes[a], rep.Classes[p], "count", count(n))
		}
	}
	lo := func(iv *[2]float64) *float64 {
		if iv == nil {
			return nil
		}
		return &iv[0]
	}
	hi := func(iv *[2]float64) *float64 {
		if iv == nil {
			return nil
		}
		return &iv[1]
	}
	for _, c := range rep.Classes {
		cf := mt.PerClass[c]
		row("class", c, "", "support", count(cf.Support))
		row("class", c, "", "predictions", count(cf.Predictions))
		for _, d := range defs {
			if d.Scope != windows.ScopeClass {
				continue
			}
			row("class", c, "", d.Name, opt(cf.Values[d.Name]))
			if d.Interval != nil {
				iv := cf.Intervals[d.Name]
				row("class", c, "", d.Name+"_lower", opt(lo(iv)))
				row("class", c, "", d.Name+"_upper", opt(hi(iv)))
			}
		}
	}
	if err := cw.WriteAll(rows); err != nil {
		return fmt.Errorf("write report: %w", err)
	}
	return nil
}

// isRequestError reports whether err is the caller's fault.
func isRequestError(err error) bool {
	var re *RequestError
	return errors.As(err, &re)
}
