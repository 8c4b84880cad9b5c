package stats

import (
	"fmt"
	"math"
	"testing"
)

func TestBenjaminiHochbergEdges(t *testing.T) {
	for _, c := range []struct {
		name string
		p    []float64
		q    float64
		want []bool
	}{
		{"none", nil, 0.05, []bool{}},
		// A NaN is never rejected but still counts towards m: 0.02 ≤ (1/2)·0.05
		// holds, 0.03 ≤ (1/2)·0.05 would not.
		{"NaN", []float64{math.NaN(), 0.02}, 0.05, []bool{false, true}},
		{"NaN counts towards m", []float64{math.NaN(), 0.03}, 0.05, []bool{false, false}},
		// Step-up: the largest passing rank rejects every smaller p-value,
		// even one above its own threshold (Benjamini & Hochberg 1995).
		{"step-up", []float64{0.011, 0.012, 0.03}, 0.03, []bool{true, true, true}},
		{"q zero", []float64{0, 0.01}, 0, []bool{true, false}},
	} {
		got := BenjaminiHochberg(c.p, c.q)
		if fmt.Sprint(got) != fmt.Sprint(c.want) {
			t.Errorf("%s: BenjaminiHochberg(%v, %g) = %v, want %v", c.name, c.p, c.q, got, c.want)
		}
	}
}
