package chart

import (
	"html/template"
	"math"
	"strconv"
)

// HeatmapMode chooses what a heatmap's cells show.
type HeatmapMode int

// Heatmap modes.
const (
	// Counts shades each cell by its count on a logarithmic scale relative
	// to the largest cell and prints the count.
	Counts HeatmapMode = iota
	// RowShare shades and prints each cell's share of its row: the
	// diagonal is the class's recall, the rest where its examples went.
	RowShare
)

// Heatmap is a confusion matrix to draw: rows actual, columns predicted,
// both in the order of Classes.
type Heatmap struct {
	Classes []string
	Matrix  [][]int64
	Mode    HeatmapMode
	// Label names the picture for screen readers and the SVG title.
	Label string
}

// Heatmap geometry.
const (
	hmLabelW = 96.0 // row label column
	hmHeadH  = 78.0 // column labels, rotated
	hmPad    = 6.0
)

// cellSize shrinks cells as the class count grows.
func cellSize(n int) float64 {
	switch {
	case n <= 4:
		return 52
	case n <= 8:
		return 40
	default:
		return 32
	}
}

// DrawHeatmap draws h. Every cell is a <g class="cell"> carrying
// data-actual, data-predicted and data-count (and data-share in RowShare
// mode, empty for an empty row), so a reader or a test can check the
// picture against the numbers it came from.
func DrawHeatmap(h Heatmap) template.HTML {
	n := len(h.Classes)
	cs := cellSize(n)
	w := hmLabelW + float64(n)*cs + hmPad*2 + 14
	ht := hmHeadH + float64(n)*cs + hmPad*2 + 14
	var s svg
	s.open(w, ht, h.Label)
	var top int64
	for _, row := range h.Matrix {
		for _, v := range row {
			top = max(top, v)
		}
	}
	x0, y0 := hmLabelW+hmPad+14, hmHeadH+hmPad
	s.text(x0+float64(n)*cs/2, 12, "middle", "cw-axis", "predicted →")
	s.printf(`<text x="10" y="%s" text-anchor="middle" class="cw-axis" transform="rotate(-90 10 %s)">actual →</text>`,
		f1(y0+float64(n)*cs/2), f1(y0+float64(n)*cs/2))
	for j, c := range h.Classes {
		x := x0 + float64(j)*cs + cs/2 + 4
		s.printf(`<text x="%s" y="%s" text-anchor="start" class="cw-tick" transform="rotate(-60 %s %s)">%s<title>%s</title></text>`,
			f1(x), f1(y0-6), f1(x), f1(y0-6), esc(clip(c, 12)), esc(c))
	}
	for i, c := range h.Classes {
		y := y0 + float64(i)*cs + cs/2 + 4
		s.printf(`<text x="%s" y="%s" text-anchor="end" class="cw-tick">%s<title>%s</title></text>`, f1(x0-6), f1(y), esc(clip(c, 13)), esc(c))
	}
	for i := range h.Classes {
		var rowTotal int64
		for _, v := range h.Matrix[i] {
			rowTotal += v
		}
		for j := range h.Classes {
			drawCell(&s, h, i, j, rowTotal, top, x0+float64(j)*cs, y0+float64(i)*cs, cs)
		}
	}
	s.printf(`<rect x="%s" y="%s" width="%s" height="%s" fill="none" stroke="%s" stroke-width="1"/>`,
		f1(x0), f1(y0), f1(float64(n)*cs), f1(float64(n)*cs), Ink)
	return s.html()
}

func drawCell(s *svg, h Heatmap, i, j int, rowTotal, top int64, x, y, cs float64) {
	v := h.Matrix[i][j]
	var shade float64
	label := Compact(v)
	share := ""
	switch h.Mode {
	case RowShare:
		if rowTotal > 0 {
			shade = float64(v) / float64(rowTotal)
			share = strconv.FormatFloat(shade, 'f', 4, 64)
			if v > 0 {
				label = strconv.FormatFloat(shade, 'f', 2, 64)
			}
		} else {
			label = "–"
		}
	default:
		if top > 0 {
			shade = math.Log1p(float64(v)) / math.Log1p(float64(top))
		}
	}
	title := h.Classes[i] + " predicted as " + h.Classes[j] + ": " + strconv.FormatInt(v, 10)
	if share != "" {
		title += " (" + strconv.FormatFloat(100*shade, 'f', 1, 64) + "% of the row)"
	}
	s.printf(`<g class="cell" data-actual="%s" data-predicted="%s" data-count="%d" data-share="%s"><title>%s</title>`,
		esc(h.Classes[i]), esc(h.Classes[j]), v, share, esc(title))
	s.printf(`<rect x="%s" y="%s" width="%s" height="%s" fill="%s" stroke="%s" stroke-width="0.5"/>`,
		f1(x), f1(y), f1(cs), f1(cs), Shade(shade), Paper)
	if i == j {
		s.printf(`<rect x="%s" y="%s" width="%s" height="%s" fill="none" stroke="%s" stroke-width="1.5"/>`,
			f1(x+3), f1(y+3), f1(cs-6), f1(cs-6), textOn(shade))
	}
	class := "cw-cell"
	if len(label) > 4 && cs < 40 {
		class = "cw-cell cw-small"
	}
	s.printf(`<text x="%s" y="%s" text-anchor="middle" class="%s" style="fill:%s">%s</text></g>`,
		f1(x+cs/2), f1(y+cs/2+4), class, textOn(shade), esc(label))
}

// Compact prints a count in at most five characters: 987, 12.3k, 4.5M.
func Compact(v int64) string {
	switch {
	case v < 10000:
		return strconv.FormatInt(v, 10)
	case v < 1000000:
		return strconv.FormatFloat(float64(v)/1e3, 'f', 1, 64) + "k"
	case v < 1000000000:
		return strconv.FormatFloat(float64(v)/1e6, 'f', 1, 64) + "M"
	}
	return strconv.FormatFloat(float64(v)/1e9, 'f', 1, 64) + "G"
}
