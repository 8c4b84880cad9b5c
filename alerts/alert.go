package alerts

import (
	"encoding/json"
	"fmt"
	"maps"
	"net/url"
	"strings"
	"time"
)

// State is an alert instance's place in its life cycle (see the package
// documentation).
type State string

// The alert states.
const (
	StateInactive State = "inactive"
	StatePending  State = "pending"
	StateFiring   State = "firing"
	StateResolved State = "resolved"
)

// Outcome is what one evaluation found for one alert instance.
type Outcome string

// Evaluation outcomes.
const (
	// OutcomeMet: the rule's condition holds.
	OutcomeMet Outcome = "met"
	// OutcomeClear: the condition does not hold.
	OutcomeClear Outcome = "clear"
	// OutcomeUnknown: too little data to judge (fewer than the rule's
	// minimum count, an empty window); the instance keeps its state.
	OutcomeUnknown Outcome = "unknown"
	// OutcomeHold: the figure lies between the levels that fire and that
	// resolve (a cusum statistic above 0 but below its threshold); the
	// instance keeps its state.
	OutcomeHold Outcome = "hold"
)

// Result holds the figures one evaluation produced for one instance. Absent
// figures are null in JSON.
type Result struct {
	Outcome Outcome `json:"outcome"`
	// Reason explains an unknown outcome.
	Reason string `json:"reason,omitempty"`
	// From and To bound the buckets of the current period.
	From time.Time `json:"from,omitzero"`
	To   time.Time `json:"to,omitzero"`
	// Value is the current figure: the metric, the proportion compared
	// (for cusum, over its matured buckets), the PSI of a shift rule, or
	// the seconds without a prediction.
	Value *float64 `json:"value"`
	// Count is the figure's denominator (labeled examples of the class for
	// recall, all predictions for label coverage, the period's total for a
	// shift rule).
	Count int64 `json:"count"`
	// Interval bounds Value at the rule's confidence.
	Interval *[2]float64 `json:"interval,omitempty"`
	// Threshold is the floor, ceiling, PSI threshold, no_traffic limit
	// (seconds) or the cusum threshold (nats).
	Threshold *float64 `json:"threshold,omitempty"`
	// Confidence is the level intervals and tests used.
	Confidence float64 `json:"confidence,omitempty"`
	// PValue is the test's p-value; for drop and confusion_rise the
	// one-sided p-value, judged with Benjamini–Hochberg across the rule's
	// instances of the model.
	PValue *float64 `json:"p_value,omitempty"`
	// Statistic and DF are the shift test's statistic and degrees of
	// freedom; for cusum, Statistic is the CUSUM in nats.
	Statistic *float64 `json:"statistic,omitempty"`
	DF        *int     `json:"df,omitempty"`
	// PSI is the shift rule's population stability index.
	PSI *float64 `json:"psi,omitempty"`
	// Difference is current minus reference, with Newcombe's interval.
	Difference         *float64    `json:"difference,omitempty"`
	DifferenceInterval *[2]float64 `json:"difference_interval,omitempty"`
	Margin             *float64    `json:"margin,omitempty"`
	Reference          *Figures    `json:"reference,omitempty"`
	// LastPrediction is the latest prediction time of a no_traffic rule.
	LastPrediction *time.Time `json:"last_prediction,omitempty"`
	// Expected and Alternative are a cusum rule's in-control proportion p0
	// and the shifted one p1 it is tuned to; TrialsPerHour the observed
	// trial rate its threshold follows from; RunStart the first bucket of
	// the statistic's current excursion above 0.
	Expected      *float64   `json:"expected,omitempty"`
	Alternative   *float64   `json:"alternative,omitempty"`
	TrialsPerHour *float64   `json:"trials_per_hour,omitempty"`
	RunStart      *time.Time `json:"run_start,omitempty"`
}

// Figures are a reference period's bounds and figure.
type Figures struct {
	From  time.Time `json:"from"`
	To    time.Time `json:"to"`
	Value *float64  `json:"value"`
	Count int64     `json:"count"`
}

// Alert is one alert instance as shown by the API and handed to notifiers:
// one rule applied to one model (and class, or pair of classes).
type Alert struct {
	Key       string `json:"key"`
	Rule      string `json:"rule"`
	Kind      Kind   `json:"kind"`
	Model     string `json:"model"`
	Class     string `json:"class,omitempty"`
	Predicted string `json:"predicted,omitempty"`
	Window    string `json:"window,omitempty"`
	// Metric is what floor, ceiling and drop rules read.
	Metric   string `json:"metric,omitempty"`
	Severity string `json:"severity"`
	State    State  `json:"state"`
	// Labels identify the alert to Alertmanager: alertname (the rule),
	// model, class, predicted (confusion_rise), severity, and the rule's
	// own labels.
	Labels      map[string]string `json:"labels"`
	Annotations map[string]string `json:"annotations,omitempty"`
	// ActiveAt is the first evaluation of the current episode with the
	// condition met; StartsAt when the alert fired; EndsAt when it resolved.
	ActiveAt     time.Time `json:"active_at,omitzero"`
	StartsAt     time.Time `json:"starts_at,omitzero"`
	EndsAt       time.Time `json:"ends_at,omitzero"`
	EvaluatedAt  time.Time `json:"evaluated_at,omitzero"`
	Result       Result    `json:"result"`
	GeneratorURL string    `json:"generator_url,omitempty"`
}

// instanceKey identifies an instance; a JSON array keeps it unambiguous
// whatever the names contain.
func instanceKey(rule, model, class, predicted string) string {
	b, _ := json.Marshal([]string{rule, model, class, predicted})
	return string(b)
}

// labels returns the alert's label set.
func (r *Compiled) labels(model, class, predicted string) map[string]string {
	l := maps.Clone(r.Labels)
	if l == nil {
		l = make(map[string]string, 5)
	}
	l["alertname"] = r.Name
	l["model"] = model
	l["severity"] = r.Severity
	if class != "" {
		l["class"] = class
	}
	if predicted != "" {
		l["predicted"] = predicted
	}
	return l
}

// TemplateData is what annotation templates see, e.g.
// "recall of {{.Class}} is {{printf \"%.2f\" .Value}}". Undefined figures
// are 0.
type TemplateData struct {
	Rule, Kind, Model, Class, Predicted, Window, Severity string
	State                                                 string
	Value, Lo, Hi, Threshold, PValue, Reference           float64
	Count                                                 int64
	// Summary is classwatch's own one-line description of the figures.
	Summary string
}

// annotate renders the rule's annotations for a; a template that fails is
// reported in its own text rather than dropped. A "summary" annotation is
// added when the rule has none.
func (r *Compiled) annotate(a *Alert) {
	res := a.Result
	d := TemplateData{
		Rule: a.Rule, Kind: string(a.Kind), Model: a.Model, Class: a.Class, Predicted: a.Predicted,
		Window: a.Window, Severity: a.Severity, State: string(a.State), Count: res.Count,
		Value: deref(res.Value), Threshold: deref(res.Threshold), PValue: deref(res.PValue),
		Summary: summary(a),
	}
	if res.Interval != nil {
		d.Lo, d.Hi = res.Interval[0], res.Interval[1]
	}
	if res.Reference != nil {
		d.Reference = deref(res.Reference.Value)
	}
	out := make(map[string]string, len(r.annotations)+1)
	for k, t := range r.annotations {
		var sb strings.Builder
		if err := t.Execute(&sb, d); err != nil {
			out[k] = fmt.Sprintf("%s (template error: %v)", r.Annotations[k], err)
			continue
		}
		out[k] = sb.String()
	}
	if _, ok := out["summary"]; !ok {
		out["summary"] = d.Summary
	}
	a.Annotations = out
}

// generatorURL links an alert to the model's windows on the daemon.
func generatorURL(base, model string) string {
	if base == "" {
		return ""
	}
	return strings.TrimSuffix(base, "/") + "/v1/models/" + url.PathEscape(model) + "/windows"
}

// summary describes an alert's latest figures in one neutral line, true
// whether the condition holds or not.
func summary(a *Alert) string {
	res := a.Result
	subject := a.Model // "card-fraud", or "fraud on card-fraud"
	if a.Class != "" && a.Predicted == "" {
		subject = a.Class + " on " + a.Model
	}
	if res.Reason != "" {
		return fmt.Sprintf("%s %s: %s", a.Rule, subject, res.Reason)
	}
	if spec, ok := kinds[a.Kind]; ok {
		return spec.describe(a, subject)
	}
	return subject // a stored alert of a kind no longer known
}

func num(p *float64) string {
	if p == nil {
		return "undefined"
	}
	return fmt.Sprintf("%.4g", *p)
}

func deref(p *float64) float64 {
	if p == nil {
		return 0
	}
	return *p
}

func ptr[T any](v T) *T { return &v }
