package api

import (
	"bytes"
	"encoding/json"
	"fmt"

	"github.com/classwatch/classwatch/windows"
)

// MarshalJSON writes the window-scope metrics in windows.MetricDefs order,
// then "reliability" when the scores are known, then "per_class"; an
// undefined metric is null.
func (f MetricFigures) MarshalJSON() ([]byte, error) {
	var b bytes.Buffer
	b.WriteByte('{')
	for _, d := range windows.MetricDefs() {
		if d.Scope == windows.ScopeWindow {
			if err := field(&b, d.Name, f.Values[d.Name]); err != nil {
				return nil, err
			}
		}
	}
	if f.Reliability != nil {
		if err := field(&b, "reliability", f.Reliability); err != nil {
			return nil, err
		}
	}
	if err := field(&b, "per_class", f.PerClass); err != nil {
		return nil, err
	}
	b.WriteByte('}')
	return b.Bytes(), nil
}

// UnmarshalJSON reads what MarshalJSON writes; fields that name no metric
// are ignored.
func (f *MetricFigures) UnmarshalJSON(data []byte) error {
	var raw map[string]json.RawMessage
	if err := json.Unmarshal(data, &raw); err != nil {
		return fmt.Errorf("decode metrics: %w", err)
	}
	*f = MetricFigures{Values: make(map[string]*float64)}
	for _, d := range windows.MetricDefs() {
		if d.Scope == windows.ScopeWindow {
			if err := decodeField(raw, d.Name, new(*float64), func(v *float64) { f.Values[d.Name] = v }); err != nil {
				return err
			}
		}
	}
	if err := decodeField(raw, "reliability", &f.Reliability, func([]windows.ReliabilityBin) {}); err != nil {
		return err
	}
	return decodeField(raw, "per_class", &f.PerClass, func(map[string]ClassFigures) {})
}

// MarshalJSON writes support and predictions, then every class-scope
// metric in windows.MetricDefs order, each followed by "<name>_interval"
// when it has an interval ([lo, hi], or null).
func (c ClassFigures) MarshalJSON() ([]byte, error) {
	var b bytes.Buffer
	b.WriteByte('{')
	if err := field(&b, "support", c.Support); err != nil {
		return nil, err
	}
	if err := field(&b, "predictions", c.Predictions); err != nil {
		return nil, err
	}
	for _, d := range windows.MetricDefs() {
		if d.Scope != windows.ScopeClass {
			continue
		}
		if err := field(&b, d.Name, c.Values[d.Name]); err != nil {
			return nil, err
		}
		if d.Interval != nil {
			if err := field(&b, d.Name+"_interval", c.Intervals[d.Name]); err != nil {
				return nil, err
			}
		}
	}
	b.WriteByte('}')
	return b.Bytes(), nil
}

// UnmarshalJSON reads what MarshalJSON writes.
func (c *ClassFigures) UnmarshalJSON(data []byte) error {
	var raw map[string]json.RawMessage
	if err := json.Unmarshal(data, &raw); err != nil {
		return fmt.Errorf("decode class figures: %w", err)
	}
	*c = ClassFigures{Values: make(map[string]*float64), Intervals: make(map[string]*[2]float64)}
	if err := decodeField(raw, "support", &c.Support, func(int64) {}); err != nil {
		return err
	}
	if err := decodeField(raw, "predictions", &c.Predictions, func(int64) {}); err != nil {
		return err
	}
	for _, d := range windows.MetricDefs() {
		if d.Scope != windows.ScopeClass {
			continue
		}
		if err := decodeField(raw, d.Name, new(*float64), func(v *float64) { c.Values[d.Name] = v }); err != nil {
			return err
		}
		if d.Interval != nil {
			if err := decodeField(raw, d.Name+"_interval", new(*[2]float64), func(v *[2]float64) { c.Intervals[d.Name] = v }); err != nil {
				return err
			}
		}
	}
	return nil
}

// field appends "name":value to an object being written, with a comma
// before it unless it is the first.
func field(b *bytes.Buffer, name string, value any) error {
	v, err := json.Marshal(value)
	if err != nil {
		return fmt.Errorf("encode %s: %w", name, err)
	}
	if b.Len() > 1 {
		b.WriteByte(',')
	}
	k, _ := json.Marshal(name) // a string always marshals
	b.Write(k)
	b.WriteByte(':')
	b.Write(v)
	return nil
}

// decodeField decodes raw[name] into dst, when present, and passes the
// decoded value to set.
func decodeField[T any](raw map[string]json.RawMessage, name string, dst *T, set func(T)) error {
	v, ok := raw[name]
	if !ok {
		return nil
	}
	if err := json.Unmarshal(v, dst); err != nil {
		return fmt.Errorf("decode %s: %w", name, err)
	}
	set(*dst)
	return nil
}
