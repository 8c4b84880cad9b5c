package chart

import (
	"html/template"
)

// Bar is one bin of a histogram.
type Bar struct {
	Label string
	N     int64
}

// Histogram is a row of bins drawn as vertical bars.
type Histogram struct {
	Label string
	Bars  []Bar
}

// Histogram geometry.
const (
	hgH    = 150.0
	hgBarW = 46.0
	hgTop  = 16.0
	hgBot  = 34.0
)

// DrawHistogram draws h with the count over each bar and the bin label
// under it; bars carry data-label and data-count.
func DrawHistogram(h Histogram) template.HTML {
	w := 12 + float64(len(h.Bars))*hgBarW
	var s svg
	s.open(w, hgH, h.Label)
	var top int64
	for _, b := range h.Bars {
		top = max(top, b.N)
	}
	base := hgH - hgBot
	s.printf(`<line x1="6" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="1"/>`, f1(base), f1(w-6), f1(base), Ink)
	for i, b := range h.Bars {
		x := 6 + float64(i)*hgBarW
		bh := 0.0
		if top > 0 {
			bh = (base - hgTop) * float64(b.N) / float64(top)
		}
		s.printf(`<g class="cw-bar" data-label="%s" data-count="%d">`, esc(b.Label), b.N)
		s.printf(`<rect x="%s" y="%s" width="%s" height="%s" fill="%s" stroke="%s" stroke-width="0.8"/>`,
			f1(x+5), f1(base-bh), f1(hgBarW-10), f1(bh), Shade(0.35+0.45*float64(i)/float64(max(1, len(h.Bars)-1))), Line)
		s.text(x+hgBarW/2, base-bh-4, "middle", "cw-tick", Compact(b.N))
		s.text(x+hgBarW/2, base+14, "middle", "cw-tick", b.Label)
		s.printf(`</g>`)
	}
	return s.html()
}
