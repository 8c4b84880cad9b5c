package chart

import (
	"html/template"
	"strconv"
	"strings"
	"time"
)

// Point is one value of a trend at time At, with an optional interval.
// A nil Value leaves a gap.
type Point struct {
	At       time.Time
	Value    *float64
	Interval *[2]float64
}

// Span is a highlighted stretch of time, such as a rule's reference period.
type Span struct {
	From, To time.Time
	Label    string
}

// Trend is one series over time.
type Trend struct {
	Label  string
	Points []Point
	// Max is the top of the value axis; 0 fits it to the data (at least
	// the largest value or interval bound, rounded up).
	Max float64
	// Spans are drawn as accent-outlined, hatched stretches.
	Spans []Span
	// Width overrides the default width of 300.
	Width float64
}

// Trend chart geometry.
const (
	trH     = 116.0
	trLeft  = 34.0
	trRight = 8.0
	trTop   = 8.0
	trBot   = 20.0
)

// DrawTrend draws t: the interval band as a filled area, the value as a
// line with square markers, gaps where a value is undefined.
func DrawTrend(t Trend) template.HTML {
	w := t.Width
	if w == 0 {
		w = 300
	}
	var s svg
	s.open(w, trH, t.Label)
	top := t.Max
	if top == 0 {
		top = fitMax(t.Points)
	}
	if len(t.Points) == 0 {
		s.text(w/2, trH/2, "middle", "cw-tick cw-muted", "no data")
		return s.html()
	}
	t0, t1 := t.Points[0].At, t.Points[len(t.Points)-1].At
	span := t1.Sub(t0).Seconds()
	if span <= 0 {
		span = 1
	}
	x := func(at time.Time) float64 { return trLeft + (w-trLeft-trRight)*at.Sub(t0).Seconds()/span }
	y := func(v float64) float64 {
		return trTop + (trH-trTop-trBot)*(1-clamp01(v/top))
	}
	for _, g := range []float64{0, top / 2, top} {
		s.printf(`<line x1="%s" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="0.6"/>`, f1(trLeft), f1(y(g)), f1(w-trRight), f1(y(g)), Rule)
		s.text(trLeft-4, y(g)+3, "end", "cw-tick", strconv.FormatFloat(g, 'g', 3, 64))
	}
	for _, sp := range t.Spans {
		x0, x1 := x(sp.From), x(sp.To)
		x0, x1 = max(x0, trLeft), min(x1, w-trRight)
		if x1 > x0 {
			s.printf(`<rect class="cw-span" x="%s" y="%s" width="%s" height="%s" fill="%s" fill-opacity="0.08" stroke="%s" stroke-dasharray="3 2"><title>%s</title></rect>`,
				f1(x0), f1(trTop), f1(x1-x0), f1(trH-trTop-trBot), Accent, Accent, esc(sp.Label))
		}
	}
	for _, run := range runs(t.Points) {
		drawRun(&s, run, x, y)
	}
	s.text(trLeft, trH-5, "start", "cw-tick", t0.UTC().Format("Jan 2 15:04"))
	s.text(w-trRight, trH-5, "end", "cw-tick", t1.UTC().Format("Jan 2 15:04"))
	return s.html()
}

// runs splits points into maximal stretches of defined values.
func runs(pts []Point) [][]Point {
	var out [][]Point
	var cur []Point
	for _, p := range pts {
		if p.Value == nil {
			if len(cur) > 0 {
				out = append(out, cur)
			}
			cur = nil
			continue
		}
		cur = append(cur, p)
	}
	if len(cur) > 0 {
		out = append(out, cur)
	}
	return out
}

func drawRun(s *svg, run []Point, x func(time.Time) float64, y func(float64) float64) {
	var upper, lower, line []string
	for _, p := range run {
		if p.Interval != nil {
			upper = append(upper, f1(x(p.At))+","+f1(y(p.Interval[1])))
			lower = append([]string{f1(x(p.At)) + "," + f1(y(p.Interval[0]))}, lower...)
		}
		line = append(line, f1(x(p.At))+","+f1(y(*p.Value)))
	}
	if len(upper) > 1 {
		s.printf(`<polygon class="cw-band" points="%s" fill="%s" fill-opacity="0.55"/>`, strings.Join(append(upper, lower...), " "), Band)
	}
	if len(line) > 1 {
		s.printf(`<polyline points="%s" fill="none" stroke="%s" stroke-width="1.6"/>`, strings.Join(line, " "), Line)
	}
	if len(run) > 60 {
		return // markers would merge into a bar
	}
	for _, p := range run {
		s.printf(`<rect class="cw-point" x="%s" y="%s" width="4" height="4" fill="%s"><title>%s: %s</title></rect>`,
			f1(x(p.At)-2), f1(y(*p.Value)-2), Ink, p.At.UTC().Format(time.RFC3339), Ratio(p.Value))
	}
}

// fitMax returns a round axis top above every value and bound of pts.
func fitMax(pts []Point) float64 {
	m := 0.0
	for _, p := range pts {
		if p.Value != nil {
			m = max(m, *p.Value)
		}
		if p.Interval != nil {
			m = max(m, p.Interval[1])
		}
	}
	for _, top := range []float64{0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5} {
		if m <= top {
			return top
		}
	}
	return 1
}
