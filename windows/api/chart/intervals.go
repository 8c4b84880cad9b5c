package chart

import (
	"html/template"
	"strconv"
	"strings"
)

// IntervalRow is one estimate with its interval on a [0, 1] scale.
type IntervalRow struct {
	Label string
	// Value is the estimate; nil draws an empty track marked undefined.
	Value *float64
	// Interval bounds the estimate; nil draws the estimate alone.
	Interval *[2]float64
	// Note is printed after the value (e.g. "n=412").
	Note string
	// Reference draws the row hollow: a reference period beside the
	// current one.
	Reference bool
	// Alert marks the row in the accent colour with a triangle.
	Alert bool
}

// Intervals is a chart of estimates with their intervals.
type Intervals struct {
	Label string
	Rows  []IntervalRow
	// Threshold, when set, draws a dashed accent line at that value.
	Threshold *float64
}

// Interval chart geometry.
const (
	ivLabelW = 104.0
	ivTrackW = 220.0
	ivNoteW  = 118.0
	ivRowH   = 20.0
	ivHeadH  = 18.0
)

// DrawIntervals draws iv: one row per entry, the interval as a rounded bar,
// the estimate as a diamond, the value and note at the right.
func DrawIntervals(iv Intervals) template.HTML {
	h := ivHeadH + float64(len(iv.Rows))*ivRowH + 6
	w := ivLabelW + ivTrackW + ivNoteW
	var s svg
	s.open(w, h, iv.Label)
	x := func(v float64) float64 { return ivLabelW + 8 + v*(ivTrackW-16) }
	for _, t := range []float64{0, 0.25, 0.5, 0.75, 1} {
		s.printf(`<line x1="%s" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="0.6"/>`, f1(x(t)), f1(ivHeadH-4), f1(x(t)), f1(h-4), Rule)
		s.text(x(t), 11, "middle", "cw-tick", trimRatio(t))
	}
	if iv.Threshold != nil {
		tx := x(clamp01(*iv.Threshold))
		s.printf(`<line x1="%s" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="1.2" stroke-dasharray="4 3" class="cw-threshold"/>`,
			f1(tx), f1(ivHeadH-4), f1(tx), f1(h-4), Accent)
	}
	for i, r := range iv.Rows {
		y := ivHeadH + float64(i)*ivRowH + ivRowH/2
		drawIntervalRow(&s, r, y, x)
	}
	return s.html()
}

func drawIntervalRow(s *svg, r IntervalRow, y float64, x func(float64) float64) {
	labelClass := "cw-tick"
	if r.Reference {
		labelClass = "cw-tick cw-muted"
	}
	s.printf(`<g class="cw-row" data-label="%s" data-value="%s">`, esc(r.Label), Ratio(r.Value))
	s.text(ivLabelW-4, y+4, "end", labelClass, clip(r.Label, 15))
	if r.Alert {
		s.printf(`<path d="M%s %s l5 -8 l5 8 z" fill="%s"><title>alerting</title></path>`, f1(2), f1(y+4), Accent)
	}
	s.printf(`<line x1="%s" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="1"/>`, f1(x(0)), f1(y), f1(x(1)), f1(y), Rule)
	if r.Interval != nil {
		lo, hi := x(clamp01(r.Interval[0])), x(clamp01(r.Interval[1]))
		fill, stroke := Band, Line
		if r.Reference {
			fill = Paper
		}
		if r.Alert {
			stroke = Accent
		}
		s.printf(`<rect x="%s" y="%s" width="%s" height="8" rx="4" fill="%s" stroke="%s" stroke-width="1"/>`,
			f1(lo-1), f1(y-4), f1(hi-lo+2), fill, stroke)
	}
	if r.Value == nil {
		s.text(x(0.5), y+4, "middle", "cw-tick cw-muted", "undefined")
	} else {
		vx := x(clamp01(*r.Value))
		fill := Ink
		if r.Reference {
			fill = Paper
		}
		s.printf(`<path d="M%s %s l5 5 l-5 5 l-5 -5 z" fill="%s" stroke="%s" stroke-width="1.2"/>`, f1(vx), f1(y-5), fill, Ink)
	}
	note := Ratio(r.Value)
	if r.Note != "" {
		note += "  " + r.Note
	}
	s.text(x(1)+12, y+4, "start", "cw-tick", note)
	s.printf(`</g>`)
}

func clamp01(v float64) float64 {
	switch {
	case v < 0:
		return 0
	case v > 1:
		return 1
	}
	return v
}

// trimRatio prints a tick value: 0, .25, .5, .75, 1.
func trimRatio(v float64) string {
	if v == 0 {
		return "0"
	}
	return strings.TrimPrefix(strconv.FormatFloat(v, 'f', -1, 64), "0")
}
