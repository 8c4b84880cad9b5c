package sim

import (
	"slices"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/windows"
)

// demoConfig mirrors the configuration keys of README.md "Configuration", plus clock
// (README.md "Join semantics and windows"), and nothing else, so a misspelt or extra key fails to decode.
type demoConfig struct {
	Listen   string `yaml:"listen"`
	Database string `yaml:"database"`
	DataDir  string `yaml:"data_dir"`
	Clock    string `yaml:"clock"`
	// MaintenanceInterval is README.md "Configuration"'s maintenance_interval.
	MaintenanceInterval string         `yaml:"maintenance_interval"`
	Bucket              string         `yaml:"bucket"`
	Confidence          float64        `yaml:"confidence"`
	Windows             []windowConfig `yaml:"windows"`
	Models              []modelConfig  `yaml:"models"`
	// Alerts belongs to the alerts package, which reads it as a node.
	Alerts yaml.Node `yaml:"alerts"`
}

type windowConfig struct {
	Name   string `yaml:"name"`
	Length string `yaml:"length"`
	Lag    string `yaml:"lag"`
}

type modelConfig struct {
	Name         string   `yaml:"name"`
	Classes      []string `yaml:"classes"`
	LabelTimeout string   `yaml:"label_timeout"`
	DefaultLabel string   `yaml:"default_label"`
	// ReferenceWindow is README.md "Configuration"'s per-model key.
	ReferenceWindow string `yaml:"reference_window"`
}

func TestConfig(t *testing.T) {
	dir := `/tmp/classwatch demo "x"\data`
	text, err := Config("127.0.0.1:9640", dir, Options{Start: testStart})
	if err != nil {
		t.Fatalf("Config: %v", err)
	}
	dec := yaml.NewDecoder(strings.NewReader(text))
	dec.KnownFields(true)
	var c demoConfig
	if err := dec.Decode(&c); err != nil {
		t.Fatalf("decode Config():\n%s\n%v", text, err)
	}
	if c.Listen != "127.0.0.1:9640" || c.DataDir != dir || c.Database != "" {
		t.Errorf("listen %q, data_dir %q, database %q; want the arguments and the embedded store", c.Listen, c.DataDir, c.Database)
	}
	if c.Clock != "event" {
		t.Errorf("clock = %q, want event: the watermark must follow simulated time", c.Clock)
	}
	bucket, err := windows.ParseDuration(c.Bucket)

	if err != nil {
		t.Fatalf("bucket: %v", err)
	}
	if c.Confidence <= 0 || c.Confidence >= 1 {
		t.Errorf("confidence = %v, want in (0, 1)", c.Confidence)
	}
	lagged := false
	var names []string
	for _, w := range c.Windows {
		names = append(names, w.Name)
		win := windows.Window{Name: w.Name}
		if win.Length, err = windows.ParseDuration(w.Length); err != nil {
			t.Errorf("window %s length: %v", w.Name, err)
		}
		if w.Lag != "" {
			if win.Lag, err = windows.ParseDuration(w.Lag); err != nil {
				t.Errorf("window %s lag: %v", w.Name, err)
			}
		}
		if err := win.Validate(bucket); err != nil {
			t.Errorf("window %s: %v", w.Name, err)
		}
		lagged = lagged || win.Lag > 0
	}
	if len(c.Windows) < 3 || !lagged {
		t.Errorf("%d windows, lagged %v; want short windows and a lagged one", len(c.Windows), lagged)
	}

	if len(c.Models) != len(scenarioClasses) {
		t.Fatalf("%d models, want %d", len(c.Models), len(scenarioClasses))
	}
	for _, m := range c.Models {
		if want := scenarioClasses[m.Name]; !slices.Equal(m.Classes, want) {
			t.Errorf("model %s classes %v, want %v", m.Name, m.Classes, want)
		}
	}
	card := c.Models[slices.IndexFunc(c.Models, func(m modelConfig) bool { return m.Name == CardScreen })]
	if card.DefaultLabel != Legit {
		t.Errorf("card-screen default_label = %q, want legit", card.DefaultLabel)
	}
	timeout, err := windows.ParseDuration(card.LabelTimeout)
	if err != nil {
		t.Fatalf("card-screen label_timeout: %v", err)
	}
	// The common chargebacks (6h + LogNormal(median 1d, σ 0.7)) must come
	// within the timeout, Φ(ln(6.75)/0.7) ≈ 0.997 of them at 7d; only the
	// weeks-late tenth may turn implied labels into corrections.
	if timeout < 7*day {
		t.Errorf("card-screen label_timeout = %v, want at least 7d", timeout)
	}

	// The alerts section parses with the alerts package's own parser and
	// names configured windows and models only.
	rules, err := alerts.ParseRules(&c.Alerts)
	if err != nil {
		t.Fatalf("alerts.ParseRules: %v", err)
	}
	kinds := map[alerts.Kind]alerts.Rule{}
	for _, r := range rules {
		kinds[r.Kind] = r
		if _, ok := scenarioClasses[r.Model]; !ok {
			t.Errorf("rule %s: model %q is not configured", r.Name, r.Model)
		}
		for _, w := range []string{r.Window, r.Reference.Window} {
			if w != "" && !slices.Contains(names, w) {
				t.Errorf("rule %s: window %q is not configured", r.Name, w)
			}
		}
	}
	drop, ok := kinds[alerts.KindDrop]
	if !ok || drop.Model != CardScreen || !slices.Equal(drop.Classes, []string{Fraud}) || drop.Metric != "recall" {
		t.Fatalf("no recall drop rule on card-screen fraud: %+v", drop)
	}
	// Its baseline ends before the drift, which starts DefaultDriftAfter in.
	if from, to := drop.Reference.From, drop.Reference.To; !from.Equal(testStart) || to.After(testStart.Add(DefaultDriftAfter)) || !to.After(from) {
		t.Errorf("drop rule baseline [%v, %v), want from %v to no later than the drift at %v", from, to, testStart, testStart.Add(DefaultDriftAfter))
	}
	// The early rule needs no label: it compares the predicted mix with
	// the matured reference day, card-screen's reference_window, which lies
	// wholly before the drift once the drift comes (README.md "Early warning").
	early, ok := kinds[alerts.KindEstimatedPrevalenceShift]
	if !ok || early.Name != EarlyRule || early.Model != CardScreen || !slices.Equal(early.Classes, []string{Fraud}) || early.Reference.Window != MaturedWindow {
		t.Errorf("no estimated prevalence rule on card-screen fraud against %s: %+v", MaturedWindow, early)
	}
	if card.ReferenceWindow != MaturedWindow {
		t.Errorf("card-screen reference_window = %q, want %s", card.ReferenceWindow, MaturedWindow)
	}
	if drop.Name != RecallRule {
		t.Errorf("recall drop rule is named %q, want %s", drop.Name, RecallRule)
	}
	// The matured day (a day, lagged past the label timeout) must be whole
	// before the drift, or the reference would hold drifted traffic.
	lag, err := windows.ParseDuration(MaturedLag)
	if err != nil || lag <= timeout {
		t.Errorf("matured window lag %q (%v) is not past the label timeout %v", MaturedLag, err, timeout)
	}
	if DefaultDriftAfter < 24*time.Hour+lag {
		t.Errorf("drift at %v comes before a matured reference day (%v)", DefaultDriftAfter, 24*time.Hour+lag)
	}
	if r, ok := kinds[alerts.KindPrevalenceShift]; !ok || r.Model != TicketRouter {
		t.Errorf("no prevalence shift rule on ticket-router: %+v", r)
	}
}

func TestConfigNeedsStart(t *testing.T) {
	if _, err := Config("127.0.0.1:9640", "/tmp/x", Options{}); err == nil {
		t.Errorf("Config without a start time: no error")
	}
}
