package chart

import (
	"flag"
	"fmt"
	"html/template"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

var update = flag.Bool("update", false, "rewrite the golden SVG files in testdata")

func ptr(v float64) *float64 { return &v }

// golden compares got with testdata/name, or rewrites it under -update.
func golden(t *testing.T, name string, got template.HTML) {
	t.Helper()
	path := filepath.Join("testdata", name)
	if *update {
		if err := os.WriteFile(path, []byte(got+"\n"), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read golden file (run go test -update once to create it): %v", err)
	}
	if string(got)+"\n" != string(want) {
		t.Errorf("%s differs from the drawing; if the change is meant, run go test ./windows/api/chart -update\ngot:\n%s", path, got)
	}
}

func TestGoldenHeatmap(t *testing.T) {
	h := Heatmap{
		Classes: []string{"legit", "fraud", "a-very-long-class-name"},
		Matrix:  [][]int64{{980, 12, 0}, {7, 31, 2}, {0, 0, 0}},
		Label:   "test matrix",
	}
	golden(t, "heatmap_counts.svg", DrawHeatmap(h))
	h.Mode = RowShare
	golden(t, "heatmap_share.svg", DrawHeatmap(h))
}

func TestGoldenIntervals(t *testing.T) {
	iv := Intervals{
		Label:     "recall",
		Threshold: ptr(0.7),
		Rows: []IntervalRow{
			{Label: "fraud", Value: ptr(0.62), Interval: &[2]float64{0.48, 0.74}, Note: "n=40", Alert: true},
			{Label: "fraud (ref)", Value: ptr(0.81), Interval: &[2]float64{0.75, 0.86}, Reference: true},
			{Label: "legit", Value: ptr(0.99), Interval: &[2]float64{0.985, 0.995}},
			{Label: "dispute", Note: "n=0"},
		},
	}
	golden(t, "intervals.svg", DrawIntervals(iv))
}

func TestGoldenTrend(t *testing.T) {
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	var pts []Point
	for i, v := range []float64{0.8, 0.82, -1, 0.7, 0.65} {
		p := Point{At: t0.Add(time.Duration(i) * 24 * time.Hour)}
		if v >= 0 {
			p.Value, p.Interval = ptr(v), &[2]float64{v - 0.1, v + 0.08}
		}
		pts = append(pts, p)
	}
	golden(t, "trend.svg", DrawTrend(Trend{Label: "fraud recall", Points: pts, Max: 1,
		Spans: []Span{{From: t0, To: t0.Add(24 * time.Hour), Label: "reference"}}}))
	golden(t, "trend_fit.svg", DrawTrend(Trend{Label: "fraud prevalence", Points: pts[:2]}))
}

func TestGoldenHistogram(t *testing.T) {
	golden(t, "histogram.svg", DrawHistogram(Histogram{Label: "label delay", Bars: []Bar{{"<1h", 120}, {"1h–1d", 40}, {"≥1d", 0}}}))
}

func TestShadeIsMonotoneInLightness(t *testing.T) {
	// Relative luminance weights of ITU-R BT.709 (common practice): the
	// ramp must darken steadily so that it stays ordered in grey print.
	prev := 2.0
	for i := 0; i <= 20; i++ {
		c := Shade(float64(i) / 20)
		var r, g, b int
		if _, err := fmt.Sscanf(c, "#%02x%02x%02x", &r, &g, &b); err != nil {
			t.Fatal(err)
		}
		l := (0.2126*float64(r) + 0.7152*float64(g) + 0.0722*float64(b)) / 255
		if l >= prev {
			t.Fatalf("Shade(%v) = %s has luminance %.3f, not below the previous %.3f", float64(i)/20, c, l, prev)
		}
		prev = l
	}
}

func TestHeatmapEscapesNames(t *testing.T) {
	got := string(DrawHeatmap(Heatmap{Classes: []string{`<b>&"`}, Matrix: [][]int64{{1}}}))
	if strings.Contains(got, "<b>") || !strings.Contains(got, `data-actual="&lt;b&gt;&amp;&#34;"`) {
		t.Errorf("class name not escaped: %s", got)
	}
}
