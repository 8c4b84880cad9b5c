// Package chart draws classwatch's pictures as inline SVG on the server:
// confusion-matrix heatmaps, per-class interval bars, trend lines with
// interval bands and a histogram. No script is needed to read them, and the
// same input always gives the same bytes, so pages and audit reports can be
// compared and fingerprinted.
//
// # Visual language
//
// One sequential ramp carries magnitude: paper white through sage and teal
// to a deep blue-green ink, monotone in lightness so that it stays ordered
// when printed in grey and reads the same to the common forms of colour
// blindness. One accent, a brick orange, marks what needs attention
// (thresholds, reference periods, alerting classes), and always comes with
// a shape of its own (dashes, a triangle), never colour alone. Estimates
// are diamonds; intervals are rounded bars; the diagonal of a confusion
// matrix carries an inner frame, so correct predictions read at a glance.
package chart

import (
	"fmt"
	"html"
	"html/template"
	"math"
	"strconv"
	"strings"
)

// rampStops returns the sequential palette, light to dark, as RGB stops.
func rampStops() [6][3]uint8 {
	return [6][3]uint8{
		{0xf7, 0xf5, 0xee},
		{0xd3, 0xe2, 0xd6},
		{0x9c, 0xc4, 0xb8},
		{0x5b, 0x98, 0x96},
		{0x2b, 0x66, 0x70},
		{0x12, 0x36, 0x42},
	}
}

// Named colours of the visual language.
const (
	// Ink is the colour of text and the estimate markers.
	Ink = "#1b2b33"
	// Paper is the background.
	Paper = "#fbfaf6"
	// Rule is the colour of grid lines and tracks.
	Rule = "#d9d6cc"
	// Accent marks thresholds, reference periods and alerting rows.
	Accent = "#b8522e"
	// Band fills interval bars and bands.
	Band = "#9cc4b8"
	// Line draws trend lines.
	Line = "#2b6670"
)

// Shade returns the ramp colour for v in [0, 1] (clamped) as #rrggbb.
func Shade(v float64) string {
	if math.IsNaN(v) || v < 0 {
		v = 0
	}
	if v > 1 {
		v = 1
	}
	ramp := rampStops()
	pos := v * float64(len(ramp)-1)
	i := int(pos)
	if i >= len(ramp)-1 {
		i = len(ramp) - 2
	}
	f := pos - float64(i)
	var out [3]uint8
	for c := range out {
		a, b := float64(ramp[i][c]), float64(ramp[i+1][c])
		out[c] = uint8(math.Round(a + f*(b-a)))
	}
	return fmt.Sprintf("#%02x%02x%02x", out[0], out[1], out[2])
}

// textOn returns the text colour readable on Shade(v).
func textOn(v float64) string {
	if v > 0.58 {
		return Paper
	}
	return Ink
}

// svg accumulates one SVG element's markup.
type svg struct {
	b strings.Builder
}

func (s *svg) open(w, h float64, label string) {
	fmt.Fprintf(&s.b, `<svg class="cw-chart" width="%s" height="%s" viewBox="0 0 %s %s" role="img" aria-label="%s">`,
		f1(w), f1(h), f1(w), f1(h), esc(label))
	fmt.Fprintf(&s.b, `<title>%s</title>`, esc(label))
}

func (s *svg) printf(format string, args ...any) { fmt.Fprintf(&s.b, format, args...) }

// text writes a text element; anchor is start, middle or end.
func (s *svg) text(x, y float64, anchor, class, body string) {
	fmt.Fprintf(&s.b, `<text x="%s" y="%s" text-anchor="%s" class="%s">%s</text>`, f1(x), f1(y), anchor, class, esc(body))
}

func (s *svg) html() template.HTML {
	s.b.WriteString(`</svg>`)
	return template.HTML(s.b.String()) // every text passed through esc
}

// f1 formats a coordinate with at most one decimal.
func f1(v float64) string {
	return strconv.FormatFloat(math.Round(v*10)/10, 'f', -1, 64)
}

func esc(s string) string { return html.EscapeString(s) }

// clip shortens a label to n runes, marking the cut with an ellipsis.
func clip(s string, n int) string {
	r := []rune(s)
	if len(r) <= n {
		return s
	}
	return string(r[:n-1]) + "…"
}

// Ratio formats a figure in [0, 1] with three decimals, "–" when nil.
func Ratio(v *float64) string {
	if v == nil {
		return "–"
	}
	return strconv.FormatFloat(*v, 'f', 3, 64)
}
