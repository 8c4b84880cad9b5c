package alerts

import (
	"cmp"
	"errors"
	"fmt"
	"maps"
	"regexp"
	"slices"
	"strings"
	"text/template"
	"time"

	"github.com/robfig/cron/v3"
)

// Kind names what a rule watches.
type Kind string

// The rule kinds.
const (
	// KindFloor fires when a metric's whole confidence interval lies below
	// the threshold.
	KindFloor Kind = "floor"
	// KindCeiling fires when a metric's whole confidence interval lies above
	// the threshold.
	KindCeiling Kind = "ceiling"
	// KindDrop fires when a per-class recall, precision or specificity is
	// lower than in a reference period by more than a margin (a one-sided
	// comparison of two proportions, Benjamini–Hochberg across the rule's
	// classes).
	KindDrop Kind = "drop"
	// KindPrevalenceShift fires when the actual-class distribution differs
	// from the reference period's.
	KindPrevalenceShift Kind = "prevalence_shift"
	// KindOutputShift fires when the predicted-class distribution (all
	// predictions, labeled or not) differs from the reference period's.
	KindOutputShift Kind = "output_shift"
	// KindConfusionRise fires when the share of one actual class predicted
	// as another rose against the reference period by more than a margin.
	KindConfusionRise Kind = "confusion_rise"
	// KindNoTraffic fires when no prediction from a model arrived for a
	// duration.
	KindNoTraffic Kind = "no_traffic"
	// KindEstimatedPrevalenceShift fires when a class's prevalence,
	// estimated from the window's predicted mix without labels, differs
	// from the reference's actual prevalence by more than a margin beyond
	// the estimate's uncertainty.
	KindEstimatedPrevalenceShift Kind = "estimated_prevalence_shift"
	// KindScoreShift fires when a class's score distribution in the window
	// differs from the reference's.
	KindScoreShift Kind = "score_shift"
	// KindCUSUM fires when a Bernoulli CUSUM over the matured buckets of a
	// per-class proportion crosses the threshold that gives the wanted
	// mean time between false alarms.
	KindCUSUM Kind = "cusum"
)

// AllModels as a rule's model applies the rule to every known model.
const AllModels = "all"

// Defaults a rule gets for the settings it leaves out.
const (
	DefaultSchedule = "* * * * *" // every minute, UTC
	DefaultSeverity = SeverityWarning
	// DefaultMinCount is the smallest count a proportion is judged on: a
	// rule of thumb, from memory, that a proportion estimated from fewer
	// than about 30 examples is too noisy to alert on.
	DefaultMinCount = 30
)

// Severities a rule may carry (its "severity" label).
const (
	SeverityCritical = "critical" // page someone now
	SeverityWarning  = "warning"  // look at it in working hours
	SeverityInfo     = "info"     // for the record
)

// severities are the allowed severities, most urgent first.
var severities = []string{SeverityCritical, SeverityWarning, SeverityInfo}

// Tests a shift rule may use.
const (
	TestChiSquare = "chi_square" // Pearson's X², no continuity correction
	TestG         = "g_test"     // log-likelihood ratio G
	TestNone      = "none"       // no significance test: PSI alone decides
)

// Intervals a floor or ceiling rule may use.
const (
	IntervalWilson   = "wilson"
	IntervalJeffreys = "jeffreys"
	IntervalNone     = "none" // compare the point value
)

// Rule is one configured alert rule. ParseRules builds rules from the
// daemon's YAML config; a rule built in Go is checked the same way by New.
type Rule struct {
	Name string
	Kind Kind
	// Model is a model name, or AllModels.
	Model string
	// Window names the configured window the rule reads (unused by
	// no_traffic).
	Window string
	// Schedule is a five-field cron expression (or a descriptor such as
	// "@every 5m") read in UTC; empty means DefaultSchedule.
	Schedule string
	// Severity is critical, warning (the default) or info.
	Severity string
	// Labels are added to the alert's labels; Annotations are text/template
	// texts rendered with the evaluation's figures (see TemplateData).
	Labels      map[string]string
	Annotations map[string]string
	// FireAfter and ResolveAfter are the consecutive evaluations with the
	// condition met (clear) before the alert fires (resolves); 0 means 1.
	FireAfter    int
	ResolveAfter int
	// Confidence overrides the daemon's confidence level; 0 keeps it.
	Confidence float64
	// MinCount is the least count a figure is judged on: the denominator of
	// a proportion, in the current and the reference period alike; 0 means
	// DefaultMinCount.
	MinCount int64

	// Metric is what floor, ceiling, drop and cusum rules read (drop:
	// recall, precision or specificity; cusum: those or prevalence;
	// default recall for both).
	Metric string
	// Classes limits per-class rules to these classes; empty means all.
	Classes []string
	// Threshold is the floor or ceiling.
	Threshold float64
	// Interval is how a floor or ceiling rule bounds the metric: wilson
	// (default), jeffreys, or none for metrics without an interval.
	Interval string
	// Margin is how much worse than the reference a figure must be, beyond
	// chance, for drop and confusion_rise (a proportion, e.g. 0.05).
	Margin float64
	// Reference is the period drop, shift and confusion_rise rules compare
	// the window with, and cusum rules take p0 from.
	Reference Reference
	// Test is the significance test of shift rules: chi_square (default),
	// g_test, or none.
	Test string
	// PSIThreshold, when positive, also requires the population stability
	// index of a shift rule to reach it.
	PSIThreshold float64
	// Pairs are the (actual, predicted) cells a confusion_rise rule
	// watches; empty means every off-diagonal cell.
	Pairs []Pair
	// QuietFor is how long a model may send no prediction (no_traffic).
	QuietFor time.Duration

	// Direction is what a cusum rule watches for: a drop (down, the
	// default) or a rise (up) of the proportion.
	Direction string
	// Lag is how old a bucket must be before a cusum rule reads it (its
	// labels have matured).
	Lag time.Duration
	// Expected is a cusum rule's in-control proportion p0 when it has no
	// reference period; 0 means unset.
	Expected float64
	// Shift is the change a cusum rule is tuned to catch fast:
	// p1 = p0 − Shift (down) or p0 + Shift (up).
	Shift float64
	// FalseAlarmEvery is a cusum rule's wanted mean time between false
	// alarms while nothing changes.
	FalseAlarmEvery time.Duration
}

// Reference is a comparison period: another configured window, or a fixed
// range of buckets [From, To).
type Reference struct {
	Window   string
	From, To time.Time
}

// String describes the reference for messages.
func (r Reference) String() string {
	if r.Window != "" {
		return "window " + r.Window
	}
	return r.From.Format(time.RFC3339) + " to " + r.To.Format(time.RFC3339)
}

// Pair is one off-diagonal cell of the confusion matrix.
type Pair struct {
	Actual    string `yaml:"actual"`
	Predicted string `yaml:"predicted"`
}

// Compiled is a checked rule with its parsed parts and its kind's
// evaluator, ready to evaluate (CompileRules).
type Compiled struct {
	Rule
	spec        kindSpec
	eval        Evaluator
	schedule    cron.Schedule
	annotations map[string]*template.Template
}

// Next returns the first scheduled time of the rule after t (UTC).
func (c *Compiled) Next(t time.Time) time.Time { return c.schedule.Next(t.UTC()) }

// fieldError is a problem with one setting of a rule or notifier; key is
// the YAML key, so that the parser can add its line.
type fieldError struct {
	key string
	msg string
}

func (e fieldError) Error() string { return e.key + ": " + e.msg }

var (
	nameRE      = regexp.MustCompile(`^[A-Za-z0-9][A-Za-z0-9_.:-]*$`)
	labelNameRE = regexp.MustCompile(`^[A-Za-z_][A-Za-z0-9_]*$`)
)

// reservedLabels are set by the evaluator on every alert.
var reservedLabels = []string{"alertname", "model", "class", "predicted", "severity"}

// Lookback is how far before its model's watermark the rule reads stored
// cells itself, beyond the configured windows it names (a cusum rule reads
// lag plus a week of buckets); 0 for the other kinds. A replay of the rule
// must hold the buckets that far back.
func (r Rule) Lookback() time.Duration {
	if spec, ok := kinds[r.Kind]; ok && spec.lookback != nil {
		return spec.lookback(&r)
	}
	return 0
}

// withDefaults fills in the settings left out.
func (r Rule) withDefaults() Rule {
	r.Schedule = cmp.Or(r.Schedule, DefaultSchedule)
	r.Severity = cmp.Or(r.Severity, DefaultSeverity)
	r.FireAfter = cmp.Or(r.FireAfter, 1)
	r.ResolveAfter = cmp.Or(r.ResolveAfter, 1)
	r.MinCount = cmp.Or(r.MinCount, DefaultMinCount)
	if spec, ok := kinds[r.Kind]; ok && spec.defaults != nil {
		spec.defaults(&r)
	}
	return r
}

// compile checks a rule (defaults filled in), parses its schedule and
// templates and builds its kind's evaluator. It returns every problem
// found; the rule is usable only when there is none.
func compile(r Rule) (*Compiled, []fieldError) {
	var errs []fieldError
	bad := func(key, format string, args ...any) {
		errs = append(errs, fieldError{key, fmt.Sprintf(format, args...)})
	}
	c := &Compiled{Rule: r}
	switch {
	case r.Name == "":
		bad("name", "required")
	case !nameRE.MatchString(r.Name):
		bad("name", "%q: use letters, digits and _ . : - (starting with a letter or digit)", r.Name)
	}
	spec, ok := kinds[r.Kind]
	if !ok {
		bad("kind", "%q is not one of %s", r.Kind, kindNames())
		return c, errs
	}
	c.spec = spec
	if r.Model == "" {
		bad("model", "required (a model name, or %q)", AllModels)
	}
	if spec.window && r.Window == "" {
		bad("window", "required")
	}
	c.checkCommon(bad)
	if spec.reference {
		checkReference(&c.Rule, bad)
	}
	c.eval = spec.build(&c.Rule, bad)
	return c, errs
}

// checkCommon checks the settings every kind has and parses the schedule
// and annotation templates.
func (c *Compiled) checkCommon(bad badFunc) {
	r := &c.Rule
	if s, err := cron.ParseStandard(r.Schedule); err != nil {
		bad("schedule", "%q: %v", r.Schedule, err)
	} else {
		c.schedule = s
	}
	if !slices.Contains(severities, r.Severity) {
		bad("severity", "%q is not one of %s", r.Severity, strings.Join(severities, ", "))
	}
	for _, k := range slices.Sorted(maps.Keys(r.Labels)) {
		switch {
		case !labelNameRE.MatchString(k):
			bad("labels", "%q is not a valid label name", k)
		case slices.Contains(reservedLabels, k):
			bad("labels", "%q is set by classwatch and cannot be overridden", k)
		}
	}
	c.annotations = make(map[string]*template.Template, len(r.Annotations))
	for _, k := range slices.Sorted(maps.Keys(r.Annotations)) {
		t, err := template.New(k).Option("missingkey=error").Parse(r.Annotations[k])
		if err != nil {
			bad("annotations", "%s: %v", k, err)
			continue
		}
		c.annotations[k] = t
	}
	if r.FireAfter < 1 {
		bad("fire_after", "must be at least 1")
	}
	if r.ResolveAfter < 1 {
		bad("resolve_after", "must be at least 1")
	}
	if r.Confidence != 0 && !(r.Confidence > 0 && r.Confidence < 1) {
		bad("confidence", "%g must lie strictly between 0 and 1", r.Confidence)
	}
	if r.MinCount < 1 {
		bad("min_count", "must be at least 1")
	}
}

// checkReference checks the reference period of kinds that compare.
func checkReference(r *Rule, bad badFunc) {
	ref := r.Reference
	switch {
	case ref.Window != "" && (!ref.From.IsZero() || !ref.To.IsZero()):
		bad("reference", "give either a window or from/to, not both")
	case ref.Window != "":
		if ref.Window == r.Window {
			bad("reference", "window %s is the rule's own window", ref.Window)
		}
	case ref.From.IsZero() || ref.To.IsZero():
		bad("reference", "required: a window, or from and to")
	case !ref.From.Before(ref.To):
		bad("reference", "from %s is not before to %s", ref.From.Format(time.RFC3339), ref.To.Format(time.RFC3339))
	}
}

// CompileRules checks every rule (defaults filled in) and that names are
// unique, and returns them ready to evaluate.
func CompileRules(rules []Rule) ([]*Compiled, error) {
	out := make([]*Compiled, 0, len(rules))
	seen := make(map[string]bool, len(rules))
	var errs []error
	for i, r := range rules {
		c, fe := compile(r.withDefaults())
		for _, e := range fe {
			errs = append(errs, fmt.Errorf("rule %s: %w", ruleLabel(r.Name, i), e))
		}
		if seen[r.Name] {
			errs = append(errs, fmt.Errorf("rule %s: name: repeated", ruleLabel(r.Name, i)))
		}
		seen[r.Name] = true
		out = append(out, c)
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return out, nil
}

// ruleLabel names rule i for messages.
func ruleLabel(name string, i int) string {
	if name == "" {
		return fmt.Sprintf("#%d", i+1)
	}
	return fmt.Sprintf("%q", name)
}
