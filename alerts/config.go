package alerts

import (
	"errors"
	"fmt"
	"os"
	"slices"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/windows"
)

// ruleKeys are the keys every rule may have; the kinds table lists those
// only some kinds take. A key that exists but does not apply to the rule's
// kind is an error, since it would silently do nothing.
var (
	ruleKeys = []string{"name", "kind", "model", "schedule", "severity", "labels",
		"annotations", "fire_after", "resolve_after", "confidence", "min_count"}
	referenceKeys = []string{"window", "from", "to"}
	pairKeys      = []string{"actual", "predicted"}
)

// ruleYAML is a rule as written; optional numbers are pointers so that an
// explicit 0 is told apart from an absent key.
type ruleYAML struct {
	Name         string            `yaml:"name"`
	Kind         string            `yaml:"kind"`
	Model        string            `yaml:"model"`
	Window       string            `yaml:"window"`
	Schedule     string            `yaml:"schedule"`
	Severity     string            `yaml:"severity"`
	Labels       map[string]string `yaml:"labels"`
	Annotations  map[string]string `yaml:"annotations"`
	FireAfter    *int              `yaml:"fire_after"`
	ResolveAfter *int              `yaml:"resolve_after"`
	Confidence   *float64          `yaml:"confidence"`
	MinCount     *int64            `yaml:"min_count"`
	Metric       string            `yaml:"metric"`
	Classes      []string          `yaml:"classes"`
	Threshold    *float64          `yaml:"threshold"`
	Interval     string            `yaml:"interval"`
	Margin       float64           `yaml:"margin"`
	Reference    *struct {
		Window string `yaml:"window"`
		From   string `yaml:"from"`
		To     string `yaml:"to"`
	} `yaml:"reference"`
	Test         string   `yaml:"test"`
	PSIThreshold *float64 `yaml:"psi_threshold"`
	Pairs        []Pair   `yaml:"pairs"`
	QuietFor     string   `yaml:"quiet_for"`
	Direction    string   `yaml:"direction"`
	Lag          string   `yaml:"lag"`
	Expected     *float64 `yaml:"expected"`
	Shift        float64  `yaml:"shift"`
	FalseAlarm   string   `yaml:"false_alarm_every"`
}

// ParseRules reads the alerts section of the daemon's config, a sequence of
// rules, and checks every rule as New would. Unknown keys, keys that do not
// apply to a rule's kind and bad values are errors naming the key and its
// line; all problems found are returned together. A nil, zero or null node
// means no rules.
func ParseRules(node *yaml.Node) ([]Rule, error) {
	items, err := sequence(node, "alerts")
	if err != nil || len(items) == 0 {
		return nil, err
	}
	var (
		rules []Rule
		errs  []error
		names = make(map[string]bool, len(items))
	)
	for i, n := range items {
		r, rerrs := parseRule(n, i)
		errs = append(errs, rerrs...)
		if r.Name != "" && names[r.Name] {
			errs = append(errs, fmt.Errorf("line %d: rule %s: name: repeated", valueLine(n, "name"), ruleLabel(r.Name, i)))
		}
		names[r.Name] = true
		rules = append(rules, r)
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return rules, nil
}

// parseRule decodes and checks one rule node; it returns the rule with its
// defaults filled in.
func parseRule(n *yaml.Node, i int) (Rule, []error) {
	label := ruleLabel(stringValue(n, "name"), i)
	p := &ruleParser{n: n, label: label}
	if n.Kind != yaml.MappingNode {
		p.fail(n.Line, "expected a mapping of rule settings")
		return Rule{}, p.errs
	}
	p.checkKeys()
	if len(p.errs) > 0 {
		return Rule{}, p.errs
	}
	var y ruleYAML
	if err := n.Decode(&y); err != nil {
		return Rule{}, decodeErrors(err, "rule "+label)
	}
	r := p.rule(&y)
	for _, k := range kinds[r.Kind].required {
		if child(n, k) == nil {
			p.fail(n.Line, "%s: required", k)
		}
	}
	r = r.withDefaults()
	_, ferrs := compile(r)
	for _, fe := range ferrs {
		p.fail(valueLine(n, fe.key), "%v", fe)
	}
	return r, p.errs
}

// ruleParser collects the problems of one rule node.
type ruleParser struct {
	n     *yaml.Node
	label string
	errs  []error
}

func (p *ruleParser) fail(line int, format string, args ...any) {
	p.errs = append(p.errs, fmt.Errorf("line %d: rule %s: %s", line, p.label, fmt.Sprintf(format, args...)))
}

// checkKeys reports keys that no rule takes, keys of another kind and
// unknown keys of the nested mappings.
func (p *ruleParser) checkKeys() {
	n := p.n
	spec, known := kinds[Kind(stringValue(n, "kind"))]
	allowed := append(slices.Clone(ruleKeys), spec.keys...)
	if spec.window {
		allowed = append(allowed, "window")
	}
	for _, k := range keys(n) {
		if slices.Contains(allowed, k.Value) {
			continue
		}
		switch {
		case !isKindKey(k.Value):
			p.fail(k.Line, "unknown key %q", k.Value)
		case known:
			p.fail(k.Line, "%s: does not apply to kind %s", k.Value, stringValue(n, "kind"))
		}
	}
	if v := child(n, "reference"); v != nil {
		p.errs = append(p.errs, checkKeys(v, "rule "+p.label+": reference", referenceKeys)...)
	}
	if v := child(n, "pairs"); v != nil && v.Kind == yaml.SequenceNode {
		for _, pr := range v.Content {
			p.errs = append(p.errs, checkKeys(pr, "rule "+p.label+": pairs", pairKeys)...)
		}
	}
}

// rule converts the decoded settings, reporting values that decoded but
// are out of range for their type of setting.
func (p *ruleParser) rule(y *ruleYAML) Rule {
	n := p.n
	r := Rule{
		Name: y.Name, Kind: Kind(y.Kind), Model: y.Model, Window: y.Window,
		Schedule: y.Schedule, Severity: y.Severity, Labels: y.Labels, Annotations: y.Annotations,
		Metric: y.Metric, Classes: y.Classes, Interval: y.Interval, Margin: y.Margin,
		Test: y.Test, Pairs: y.Pairs, Direction: y.Direction, Shift: y.Shift,
	}
	// Settings whose zero means "default" in Go refuse an explicit zero, so
	// that "fire_after: 0" is not quietly read as 1.
	r.FireAfter = int(p.positive("fire_after", intPtr64(y.FireAfter)))
	r.ResolveAfter = int(p.positive("resolve_after", intPtr64(y.ResolveAfter)))
	r.MinCount = p.positive("min_count", y.MinCount)
	if c := y.Confidence; c != nil {
		if !(*c > 0 && *c < 1) {
			p.fail(valueLine(n, "confidence"), "confidence: %g must lie strictly between 0 and 1", *c)
		} else {
			r.Confidence = *c
		}
	}
	if y.Threshold != nil {
		r.Threshold = *y.Threshold
	}
	if y.PSIThreshold != nil {
		if *y.PSIThreshold > 0 {
			r.PSIThreshold = *y.PSIThreshold
		} else {
			p.fail(valueLine(n, "psi_threshold"), "psi_threshold: must be positive")
		}
	}
	r.QuietFor = p.duration("quiet_for", y.QuietFor)
	r.Lag = p.duration("lag", y.Lag)
	r.FalseAlarmEvery = p.duration("false_alarm_every", y.FalseAlarm)
	if y.Expected != nil {
		r.Expected = *y.Expected
	}
	if y.Reference != nil {
		r.Reference = p.reference(y.Reference.Window, y.Reference.From, y.Reference.To)
	}
	return r
}

// positive returns *v, 0 when absent, reporting a value below 1.
func (p *ruleParser) positive(key string, v *int64) int64 {
	if v == nil {
		return 0
	}
	if *v <= 0 {
		p.fail(valueLine(p.n, key), "%s: must be at least 1", key)
		return 0
	}
	return *v
}

// duration parses the duration s of key, 0 when empty.
func (p *ruleParser) duration(key, s string) time.Duration {
	if s == "" {
		return 0
	}
	d, err := windows.ParseDuration(s)
	if err != nil {
		p.fail(valueLine(p.n, key), "%s: %v", key, err)
	}
	return d
}

// reference parses a reference mapping's values.
func (p *ruleParser) reference(window, from, to string) Reference {
	ref := Reference{Window: window}
	refNode := child(p.n, "reference")
	for _, f := range []struct {
		key string
		s   string
		t   *time.Time
	}{{"from", from, &ref.From}, {"to", to, &ref.To}} {
		if f.s == "" {
			continue
		}
		t, err := time.Parse(time.RFC3339, f.s)
		if err != nil {
			p.fail(valueLine(refNode, f.key), "reference: %s: %q is not an RFC 3339 time", f.key, f.s)
		}
		*f.t = t.UTC()
	}
	return ref
}

func intPtr64(p *int) *int64 {
	if p == nil {
		return nil
	}
	v := int64(*p)
	return &v
}

// CheckFile validates the alerts and notifiers sections of the config file
// at path without starting anything: the parse New would see, plus, when
// the file lists windows, that every rule names one of them. Other
// top-level keys are not checked here.
func CheckFile(path string) error {
	data, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("read config: %w", err)
	}
	var doc yaml.Node
	if err := yaml.Unmarshal(data, &doc); err != nil {
		return fmt.Errorf("parse %s: %w", path, err)
	}
	if len(doc.Content) == 0 {
		return nil // an empty file has no rules
	}
	top := doc.Content[0]
	if top.Kind != yaml.MappingNode {
		return fmt.Errorf("%s: line %d: expected a mapping at the top level", path, top.Line)
	}
	rules, rerr := ParseRules(child(top, "alerts"))
	_, nerr := ParseNotifiers(child(top, "notifiers"))
	errs := []error{rerr, nerr}
	if ws := child(top, "windows"); ws != nil && rerr == nil {
		errs = append(errs, checkWindowNames(rules, windowNames(ws)))
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	return nil
}

// windowNames reads the name of each entry of a windows sequence.
func windowNames(n *yaml.Node) []string {
	var names []string
	if n.Kind != yaml.SequenceNode {
		return nil
	}
	for _, w := range n.Content {
		if name := stringValue(w, "name"); name != "" {
			names = append(names, name)
		}
	}
	return names
}

// CheckWindows reports the rules that name a window (their own or their
// reference's) missing from ws, and those whose kind cannot use the
// window they name (a cusum reference inside its own buckets): the check
// New makes, for a caller that validates a configuration without building
// a Manager.
func CheckWindows(rules []Rule, ws []windows.Window) error {
	names := make([]string, len(ws))
	for i, w := range ws {
		names[i] = w.Name
	}
	errs := []error{checkWindowNames(rules, names)}
	for i, r := range rules {
		spec, ok := kinds[r.Kind]
		if !ok || spec.checkWindows == nil {
			continue
		}
		if err := spec.checkWindows(&r, ws); err != nil {
			errs = append(errs, fmt.Errorf("rule %s: %w", ruleLabel(r.Name, i), err))
		}
	}
	return errors.Join(errs...)
}

// checkWindowNames reports rules that name a window not in names.
func checkWindowNames(rules []Rule, names []string) error {
	var errs []error
	for i, r := range rules {
		for _, w := range []string{r.Window, r.Reference.Window} {
			if w != "" && !slices.Contains(names, w) {
				errs = append(errs, fmt.Errorf("rule %s: window %q is not configured (windows: %v)", ruleLabel(r.Name, i), w, names))
			}
		}
	}
	return errors.Join(errs...)
}

// sequence returns the items of a sequence node. nil, a zero Node (an
// absent key decoded into a yaml.Node field) and null are empty.
func sequence(n *yaml.Node, section string) ([]*yaml.Node, error) {
	if n == nil || n.Kind == 0 || n.Tag == "!!null" {
		return nil, nil
	}
	if n.Kind != yaml.SequenceNode {
		return nil, fmt.Errorf("line %d: %s: expected a list", n.Line, section)
	}
	return n.Content, nil
}

// keys returns the key nodes of a mapping.
func keys(n *yaml.Node) []*yaml.Node {
	var ks []*yaml.Node
	for i := 0; i+1 < len(n.Content); i += 2 {
		ks = append(ks, n.Content[i])
	}
	return ks
}

// child returns the value node of key in mapping n, or nil.
func child(n *yaml.Node, key string) *yaml.Node {
	if n == nil || n.Kind != yaml.MappingNode {
		return nil
	}
	for i := 0; i+1 < len(n.Content); i += 2 {
		if n.Content[i].Value == key {
			return n.Content[i+1]
		}
	}
	return nil
}

// stringValue returns the scalar value of key in mapping n, or "".
func stringValue(n *yaml.Node, key string) string {
	if v := child(n, key); v != nil && v.Kind == yaml.ScalarNode {
		return v.Value
	}
	return ""
}

// valueLine returns the line of key's value in mapping n, or n's own line
// when the key is absent.
func valueLine(n *yaml.Node, key string) int {
	if v := child(n, key); v != nil {
		return v.Line
	}
	if n == nil {
		return 0
	}
	return n.Line
}

// checkKeys reports keys of mapping n that are not in allowed; what names
// the mapping in messages.
func checkKeys(n *yaml.Node, what string, allowed []string) []error {
	if n.Kind != yaml.MappingNode {
		return []error{fmt.Errorf("line %d: %s: expected a mapping", n.Line, what)}
	}
	var errs []error
	for _, k := range keys(n) {
		if !slices.Contains(allowed, k.Value) {
			errs = append(errs, fmt.Errorf("line %d: %s: unknown key %q", k.Line, what, k.Value))
		}
	}
	return errs
}

// decodeErrors turns a decoding error into one error per problem, each
// starting with its line as yaml reports it, followed by what.
func decodeErrors(err error, what string) []error {
	var te *yaml.TypeError
	if !errors.As(err, &te) {
		return []error{fmt.Errorf("%s: %w", what, err)}
	}
	errs := make([]error, len(te.Errors))
	for i, e := range te.Errors {
		if line, msg, ok := strings.Cut(e, ": "); ok && strings.HasPrefix(line, "line ") {
			errs[i] = fmt.Errorf("%s: %s: %s", line, what, msg)
		} else {
			errs[i] = fmt.Errorf("%s: %s", what, e)
		}
	}
	return errs
}
