package main

import (
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows"
)

// windowConfig is one rolling window.
type windowConfig struct {
	Name   string   `yaml:"name"`
	Length duration `yaml:"length"`
	Lag    duration `yaml:"lag,omitempty"`
}

// modelConfig is one configured model. Pointer fields override the
// top-level value when set.
type modelConfig struct {
	Name         string   `yaml:"name"`
	Classes      []string `yaml:"classes"`
	LabelTimeout duration `yaml:"label_timeout,omitempty"`
	DefaultLabel string   `yaml:"default_label,omitempty"`

	Bucket *duration `yaml:"bucket,omitempty"`
	// Windows, when set, replace the top-level list for this model.
	Windows       []windowConfig `yaml:"windows,omitempty"`
	EarlyLabelTTL *duration      `yaml:"early_label_ttl,omitempty"`
	Retention     *duration      `yaml:"retention,omitempty"`
	// AutoRegister registers classes the model does not have yet.
	AutoRegister *bool `yaml:"auto_register,omitempty"`
	MaxClasses   *int  `yaml:"max_classes,omitempty"`
	// ReferenceWindow names one of the model's windows that the
	// early-warning figures compare with (README.md "Early warning").
	ReferenceWindow string `yaml:"reference_window,omitempty"`
}

func (w windowConfig) window() windows.Window {
	return windows.Window{Name: w.Name, Length: time.Duration(w.Length), Lag: time.Duration(w.Lag)}
}

// modelWindows returns the bucket and windows of a model: its overrides,
// else the top-level values (also for models that are not configured).
func (c config) modelWindows(model string) (time.Duration, []windows.Window) {
	bucket, ws := time.Duration(c.Bucket), c.Windows
	for _, m := range c.Models {
		if m.Name != model {
			continue
		}
		if m.Bucket != nil {
			bucket = time.Duration(*m.Bucket)
		}
		if m.Windows != nil {
			ws = m.Windows
		}
	}
	out := make([]windows.Window, len(ws))
	for i, w := range ws {
		out[i] = w.window()
	}
	return bucket, out
}

// allWindows returns every window any model uses, each name once: the
// top-level list, then models' own windows (names are validated unique per
// list; a model may reuse a top-level name for a window of its own).
func (c config) allWindows() []windows.Window {
	_, out := c.modelWindows("")
	seen := map[string]bool{}
	for _, w := range out {
		seen[w.Name] = true
	}
	for _, m := range c.Models {
		for _, w := range m.Windows {
			if !seen[w.Name] {
				seen[w.Name] = true
				out = append(out, w.window())
			}
		}
	}
	return out
}

// trackerOptions maps the configuration onto windows.TrackerOptions. The
// caller adds Store and Now.
func (c config) trackerOptions() windows.TrackerOptions {
	opts := windows.TrackerOptions{
		DefaultBucket: time.Duration(c.Bucket),
		Clock:         windows.Clock(c.Clock),
		MaxSeries:     c.MaxSeries,
	}
	if c.MaxSeries == 0 {
		opts.MaxSeries = -1 // no budget
	}
	_, opts.DefaultWindows = c.modelWindows("")
	for _, m := range c.Models {
		bucket, ws := c.modelWindows(m.Name)
		opts.Models = append(opts.Models, windows.ModelOptions{Name: m.Name, Bucket: bucket, Windows: ws, ReferenceWindow: m.ReferenceWindow})
	}
	return opts
}

// scrapeShapes returns what bounds each model's /metrics series: the
// configured models, plus as many auto-registered ones as max_models
// leaves room for (an unbounded number without a cap).
func (c config) scrapeShapes() []windows.ModelShape {
	var shapes []windows.ModelShape
	for _, m := range c.Models {
		p := c.modelPolicy(m)
		classes := len(m.Classes)
		if p.AutoRegister {
			classes = p.MaxClasses
		}
		_, ws := c.modelWindows(m.Name)
		shapes = append(shapes, windows.ModelShape{Classes: classes, Windows: len(ws)})
	}
	if !c.AutoRegister {
		return shapes
	}
	_, ws := c.modelWindows("")
	if c.MaxModels == 0 {
		// No model cap: as unbounded as a model without a class cap.
		return append(shapes, windows.ModelShape{Classes: 0, Windows: len(ws)})
	}
	for range c.MaxModels - len(c.Models) {
		shapes = append(shapes, windows.ModelShape{Classes: c.MaxClasses, Windows: len(ws)})
	}
	return shapes
}

// modelPolicy maps one model onto its collector policy, with the
// top-level defaults where the model sets nothing.
func (c config) modelPolicy(m modelConfig) collector.ModelPolicy {
	bucket, _ := c.modelWindows(m.Name)
	p := collector.ModelPolicy{
		Name:          m.Name,
		Classes:       slices.Clone(m.Classes),
		Bucket:        bucket,
		LabelTimeout:  time.Duration(m.LabelTimeout),
		DefaultLabel:  m.DefaultLabel,
		EarlyLabelTTL: time.Duration(c.EarlyLabelTTL),
		Retention:     time.Duration(c.Retention),
		MaxClasses:    c.MaxClasses,
	}
	if m.EarlyLabelTTL != nil {
		p.EarlyLabelTTL = time.Duration(*m.EarlyLabelTTL)
	}
	if m.Retention != nil {
		p.Retention = time.Duration(*m.Retention)
	}
	if m.AutoRegister != nil {
		p.AutoRegister = *m.AutoRegister
	}
	if m.MaxClasses != nil {
		p.MaxClasses = *m.MaxClasses
	}
	return p
}

// validateModels checks every model and returns the set of their names.
func (c config) validateModels(p *problems) map[string]bool {
	models := map[string]bool{}
	for i, m := range c.Models {
		mp := fmt.Sprintf("models[%d]", i)
		if err := collector.ValidModelName(m.Name); err != nil {
			p.add(mp+".name", "%v", err)
		} else if models[m.Name] {
			p.add(mp+".name", "model %q is configured twice", m.Name)
		}
		models[m.Name] = true
		c.validateClasses(p, m, mp)
		c.validateLabelPolicy(p, m, mp)
		c.validateModelWindows(p, m, mp)
	}
	return models
}

// validateClasses checks a model's class list against its caps.
func (c config) validateClasses(p *problems, m modelConfig, mp string) {
	seen := map[string]bool{}
	for j, cl := range m.Classes {
		cp := fmt.Sprintf("%s.classes[%d]", mp, j)
		if err := collector.ValidClassName(cl); err != nil {
			p.add(cp, "%v", err)
		} else if seen[cl] {
			p.add(cp, "class %q is listed twice", cl)
		}
		seen[cl] = true
	}
	autoRegister := m.AutoRegister != nil && *m.AutoRegister
	if len(m.Classes) < 2 && !autoRegister {
		p.add(mp+".classes", "a model needs at least two classes unless it sets auto_register")
	}
	maxClasses := modelValue(p, mp+".max_classes", m.MaxClasses, c.MaxClasses)
	if maxClasses > 0 && len(m.Classes) > maxClasses {
		p.add(mp+".classes", "%d classes pass max_classes %d", len(m.Classes), maxClasses)
	}
}

// validateLabelPolicy checks a model's default label, timeouts and
// retention.
func (c config) validateLabelPolicy(p *problems, m modelConfig, mp string) {
	switch {
	case m.DefaultLabel == "" && m.LabelTimeout != 0:
		p.add(mp+".default_label", "is required with label_timeout")
	case m.DefaultLabel != "" && m.LabelTimeout == 0:
		p.add(mp+".label_timeout", "is required with default_label")
	case m.LabelTimeout < 0:
		p.add(mp+".label_timeout", "must be positive")
	case m.DefaultLabel != "" && !slices.Contains(m.Classes, m.DefaultLabel):
		p.add(mp+".default_label", "%q is not one of the classes", m.DefaultLabel)
	}
	if m.EarlyLabelTTL != nil && *m.EarlyLabelTTL < 0 {
		p.add(mp+".early_label_ttl", "must not be negative")
	}
	retention := modelValue(p, mp+".retention", m.Retention, c.Retention)
	if retention > 0 && m.LabelTimeout > 0 && retention <= m.LabelTimeout {
		key := mp + ".retention"
		if m.Retention == nil {
			key = "retention"
		}
		p.add(key, "%s must exceed %s.label_timeout %s, or predictions are purged before their default label applies",
			windows.FormatDuration(time.Duration(retention)), mp, windows.FormatDuration(time.Duration(m.LabelTimeout)))
	}
}

// validateModelWindows checks a model's bucket and windows: its own list,
// or the top-level one, which must then fit its bucket.
func (c config) validateModelWindows(p *problems, m modelConfig, mp string) {
	bucket := time.Duration(c.Bucket)
	if m.Bucket != nil {
		bucket = time.Duration(*m.Bucket)
		if err := checkBucket(bucket); err != nil {
			p.add(mp+".bucket", "%v", err)
			return
		}
	}
	if m.Windows != nil {
		if len(m.Windows) == 0 {
			p.add(mp+".windows", "lists no window; leave the key out to use the top-level windows")
		}
		checkWindows(p, m.Windows, bucket, mp+".windows")
		return
	}
	if m.Bucket != nil {
		for i, w := range c.Windows {
			if err := w.window().Validate(bucket); err != nil {
				p.add(mp+".bucket", "does not fit windows[%d]: %v", i, err)
			}
		}
	}
}

// checkBucket accepts buckets that tile a UTC day (a divisor of 24h) or are
// whole days, so that bucket bounds fall on day boundaries.
func checkBucket(b time.Duration) error {
	const day = 24 * time.Hour
	switch {
	case b <= 0:
		return errors.New("must be positive")
	case b < time.Second || b%time.Second != 0:
		return fmt.Errorf("%s is not a whole number of seconds", b)
	case day%b != 0 && b%day != 0:
		return fmt.Errorf("%s neither divides a day nor is a whole number of days", windows.FormatDuration(b))
	}
	return nil
}

// checkWindows checks a window list against its bucket, each name once.
func checkWindows(p *problems, ws []windowConfig, bucket time.Duration, path string) {
	seen := map[string]bool{}
	for i, w := range ws {
		wp := fmt.Sprintf("%s[%d]", path, i)
		if err := w.window().Validate(bucket); err != nil {
			p.add(wp, "%v", err)
		}
		if w.Name != "" && seen[w.Name] {
			p.add(wp+".name", "window %q is listed twice", w.Name)
		}
		seen[w.Name] = true
	}
}

// modelValue returns a model's own setting when it has one, reporting a
// negative one under key, else the config-wide default.
func modelValue[T ~int | ~int64](p *problems, key string, own *T, def T) T {
	if own == nil {
		return def
	}
	if *own < 0 {
		p.add(key, "must not be negative")
	}
	return *own
}
