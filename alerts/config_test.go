package alerts

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"
)

// parseSection decodes text and returns the value of its top-level key.
func parseSection(tb testing.TB, text, key string) *yaml.Node {
	tb.Helper()
	var doc yaml.Node
	if err := yaml.Unmarshal([]byte(text), &doc); err != nil {
		tb.Fatalf("yaml: %v", err)
	}
	return child(doc.Content[0], key)
}

func TestParseRulesDefaults(t *testing.T) {
	rules, err := ParseRules(parseSection(t, `
alerts:
  - name: fraud-recall-floor
    kind: floor
    model: card-fraud
    window: 1d
    metric: recall
    threshold: 0.8
  - name: fraud-recall-drop
    kind: drop
    model: card-fraud
    window: 1d
    reference: {window: 7d-matured}
  - name: quiet
    kind: no_traffic
    model: all
    quiet_for: 1d2h
`, "alerts"))
	if err != nil {
		t.Fatalf("ParseRules: %v", err)
	}
	if got, want := len(rules), 3; got != want {
		t.Fatalf("got %d rules, want %d", got, want)
	}
	floor, drop, quiet := rules[0], rules[1], rules[2]
	for _, c := range []struct {
		what      string
		got, want any
	}{
		{"schedule", floor.Schedule, DefaultSchedule},
		{"severity", floor.Severity, DefaultSeverity},
		{"fire_after", floor.FireAfter, 1},
		{"resolve_after", floor.ResolveAfter, 1},
		{"min_count", floor.MinCount, int64(DefaultMinCount)},
		{"interval", floor.Interval, IntervalWilson},
		{"confidence (0: the daemon's)", floor.Confidence, 0.0},
		{"drop metric", drop.Metric, "recall"},
		{"drop margin", drop.Margin, 0.0},
		{"reference", drop.Reference.Window, "7d-matured"},
		{"quiet_for", quiet.QuietFor, 26 * time.Hour},
	} {
		if c.got != c.want {
			t.Errorf("%s = %v, want %v", c.what, c.got, c.want)
		}
	}
}

// TestParseRulesErrors checks that each mistake is reported with its key
// and line.
func TestParseRulesErrors(t *testing.T) {
	for _, c := range []struct {
		name string
		yaml string
		want []string // substrings of the error
	}{
		{"unknown key", `
alerts:
  - name: r
    kind: floor
    model: m
    window: 1d
    metric: recall
    treshold: 0.8`, []string{`line 8: rule "r": unknown key "treshold"`}},
		{"key of another kind", `
alerts:
  - name: r
    kind: drop
    model: m
    window: 1d
    threshold: 0.8
    reference: {window: w}`, []string{`line 7: rule "r": threshold: does not apply to kind drop`}},
		{"bad value type", `
alerts:
  - name: r
    kind: floor
    model: m
    window: 1d
    metric: recall
    threshold: high`, []string{"line 8: rule \"r\": cannot unmarshal !!str `high`"}},
		{"threshold out of range", `
alerts:
  - name: r
    kind: ceiling
    model: m
    window: 1d
    metric: precision
    threshold: 1.5`, []string{`line 8: rule "r": threshold: 1.5 must lie between 0 and 1`}},
		{"unknown kind", `
alerts:
  - name: r
    kind: spike
    model: m`, []string{`line 4: rule "r": kind: "spike" is not one of`}},
		{"metric without interval", `
alerts:
  - name: r
    kind: floor
    model: m
    window: 1d
    metric: f1
    threshold: 0.5`, []string{`rule "r": interval: metric f1 is not a proportion`, "interval: none"}},
		{"bad schedule", `
alerts:
  - name: r
    kind: no_traffic
    model: m
    schedule: "every minute"
    quiet_for: 1h`, []string{`line 6: rule "r": schedule: "every minute"`}},
		{"zero fire_after", `
alerts:
  - name: r
    kind: no_traffic
    model: m
    quiet_for: 1h
    fire_after: 0`, []string{`line 7: rule "r": fire_after: must be at least 1`}},
		{"confidence of 1", `
alerts:
  - name: r
    kind: no_traffic
    model: m
    quiet_for: 1h
    confidence: 1`, []string{`line 7: rule "r": confidence: 1 must lie strictly between 0 and 1`}},
		{"reference missing", `
alerts:
  - name: r
    kind: prevalence_shift
    model: m
    window: 1d`, []string{`rule "r": reference: required`}},
		{"reference both ways", `
alerts:
  - name: r
    kind: drop
    model: m
    window: 1d
    reference: {window: w, from: 2026-01-01T00:00:00Z, to: 2026-02-01T00:00:00Z}`, []string{`line 7: rule "r": reference: give either a window or from/to`}},
		{"reference unknown key", `
alerts:
  - name: r
    kind: drop
    model: m
    window: 1d
    reference:
      window: w
      lag: 3d`, []string{`line 9: rule "r": reference: unknown key "lag"`}},
		{"reference bad time", `
alerts:
  - name: r
    kind: drop
    model: m
    window: 1d
    reference:
      from: yesterday
      to: 2026-02-01T00:00:00Z`, []string{`line 8: rule "r": reference: from: "yesterday" is not an RFC 3339 time`}},
		{"diagonal pair", `
alerts:
  - name: r
    kind: confusion_rise
    model: m
    window: 1d
    pairs: [{actual: fraud, predicted: fraud}]
    reference: {window: w}`, []string{`line 7: rule "r": pairs: fraud→fraud is on the diagonal`}},
		{"reserved label and bad template", `
alerts:
  - name: r
    kind: no_traffic
    model: m
    quiet_for: 1h
    labels: {severity: high}
    annotations: {summary: "{{.Value"}`, []string{`line 7: rule "r": labels: "severity" is set by classwatch`, `line 8: rule "r": annotations: summary:`}},
		{"repeated name and missing model", `
alerts:
  - name: r
    kind: no_traffic
    model: m
    quiet_for: 1h
  - name: r
    kind: no_traffic
    quiet_for: 1h`, []string{`line 7: rule "r": name: repeated`, `rule "r": model: required`}},
		{"test none without psi", `
alerts:
  - name: r
    kind: output_shift
    model: m
    window: 1d
    test: none
    reference: {window: w}`, []string{`rule "r": psi_threshold: required when test is none`}},
		{"not a list", `
alerts:
  name: r`, []string{"line 3: alerts: expected a list"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := ParseRules(parseSection(t, c.yaml, "alerts"))
			if err == nil {
				t.Fatal("ParseRules = nil error, want one")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q\ndoes not contain %q", err, w)
				}
			}
		})
	}
}

func TestParseNotifiers(t *testing.T) {
	ns, err := ParseNotifiers(parseSection(t, `
notifiers:
  - name: oncall
    type: alertmanager
    url: http://127.0.0.1:9093
  - name: hook
    type: webhook
    url: https://hooks.example.invalid/x
    bearer_token: s3cr3t-t0ken
    max_attempts: 2
    retry_wait: 250ms
`, "notifiers"))
	if err != nil {
		t.Fatalf("ParseNotifiers: %v", err)
	}
	am, hook := ns[0], ns[1]
	if am.ResendInterval != DefaultResendInterval || am.Timeout != DefaultTimeout || am.MaxAttempts != DefaultMaxAttempts || am.QueueSize != DefaultQueueSize {
		t.Errorf("alertmanager defaults = %+v", am)
	}
	if hook.ResendInterval != 0 || hook.MaxAttempts != 2 || hook.RetryWait != 250*time.Millisecond {
		t.Errorf("webhook = %+v", hook)
	}
	if got := hook.BearerToken.String(); got != "<secret>" {
		t.Errorf("token prints as %q, want <secret>", got)
	}

	for _, c := range []struct {
		name string
		yaml string
		want []string
		not  string // must not appear (a secret)
	}{
		{"unknown key", `
notifiers:
  - name: n
    type: webhook
    url: http://x.invalid/
    retries: 3`, []string{`line 6: notifier "n": unknown key "retries"`}, ""},
		{"resend on a webhook", `
notifiers:
  - name: n
    type: webhook
    url: http://x.invalid/
    resend_interval: 1m`, []string{`line 6: notifier "n": resend_interval: applies to alertmanager notifiers only`}, ""},
		{"bad url is not echoed", `
notifiers:
  - name: n
    type: webhook
    url: "hooks.invalid/path?token=hunter2"`, []string{`line 5: notifier "n": url: must be an absolute http or https URL`}, "hunter2"},
		{"bad duration and count", `
notifiers:
  - name: n
    type: alertmanager
    url: http://x.invalid/
    timeout: soon
    queue_size: 0`, []string{`line 6: notifier "n": timeout: "soon" is not a positive duration`, `line 7: notifier "n": queue_size: must be at least 1`}, ""},
		{"both tokens", `
notifiers:
  - name: n
    type: webhook
    url: http://x.invalid/
    bearer_token: a
    bearer_token_file: /b`, []string{`line 6: notifier "n": bearer_token: give bearer_token or bearer_token_file, not both`}, ""},
		{"unknown type", `
notifiers:
  - name: n
    type: pager
    url: http://x.invalid/`, []string{`line 4: notifier "n": type: "pager" is not one of`}, ""},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := ParseNotifiers(parseSection(t, c.yaml, "notifiers"))
			if err == nil {
				t.Fatal("ParseNotifiers = nil error, want one")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q\ndoes not contain %q", err, w)
				}
			}
			if c.not != "" && strings.Contains(err.Error(), c.not) {
				t.Errorf("error %q reveals %q", err, c.not)
			}
		})
	}
}

// TestCheckFileExample checks the example config in testdata, which also
// documents the rule syntax.
func TestCheckFileExample(t *testing.T) {
	if err := CheckFile("testdata/classwatch.yml"); err != nil {
		t.Fatalf("CheckFile(testdata/classwatch.yml): %v", err)
	}
}

func TestCheckFileErrors(t *testing.T) {
	dir := t.TempDir()
	write := func(name, text string) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, []byte(text), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	for _, c := range []struct {
		name, text string
		want       []string
	}{
		{"unknown window", `
windows:
  - {name: 1h, length: 1h}
alerts:
  - {name: r, kind: floor, model: m, window: 1d, metric: recall, threshold: 0.5}
`, []string{`rule "r": window "1d" is not configured`}},
		{"rule and notifier errors together", `
database: ""
alerts:
  - {name: r, kind: floor, model: m, window: 1d, metric: recall}
notifiers:
  - {name: n, type: webhook}
`, []string{`line 4: rule "r": threshold: required`, `line 6: notifier "n": url: must be`}},
		{"not yaml", "alerts: [\n", []string{"parse "}},
	} {
		t.Run(c.name, func(t *testing.T) {
			p := write(strings.ReplaceAll(c.name, " ", "-")+".yml", c.text)
			err := CheckFile(p)
			if err == nil {
				t.Fatal("CheckFile = nil, want an error")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q\ndoes not contain %q", err, w)
				}
			}
		})
	}
	if err := CheckFile(write("empty.yml", "")); err != nil {
		t.Errorf("CheckFile(empty) = %v, want nil", err)
	}
	if err := CheckFile(filepath.Join(dir, "absent.yml")); err == nil {
		t.Error("CheckFile(absent) = nil, want an error")
	}
}

// TestParseEmptySections: the daemon decodes its config into a struct with
// yaml.Node fields for these sections; an absent or empty section is no
// rules and no notifiers.
func TestParseEmptySections(t *testing.T) {
	var cfg struct {
		Listen    string    `yaml:"listen"`
		Alerts    yaml.Node `yaml:"alerts"`
		Notifiers yaml.Node `yaml:"notifiers"`
	}
	for _, text := range []string{"listen: x\n", "listen: x\nalerts:\nnotifiers: []\n"} {
		if err := yaml.Unmarshal([]byte(text), &cfg); err != nil {
			t.Fatal(err)
		}
		rules, rerr := ParseRules(&cfg.Alerts)
		ns, nerr := ParseNotifiers(&cfg.Notifiers)
		if len(rules) != 0 || len(ns) != 0 || rerr != nil || nerr != nil {
			t.Errorf("%q: rules %v (%v), notifiers %v (%v); want none, no error", text, rules, rerr, ns, nerr)
		}
	}
}
