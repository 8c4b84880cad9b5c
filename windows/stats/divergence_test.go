package stats

import (
	"math"
	"testing"
)

func TestPSIErrors(t *testing.T) {
	for _, c := range []struct {
		name string
		e, a []int64
		eps  float64
	}{
		{"lengths differ", []int64{1, 2}, []int64{1}, 1e-4},
		{"empty", nil, nil, 1e-4},
		{"negative", []int64{1, -1}, []int64{1, 1}, 1e-4},
		{"no counts", []int64{0, 0}, []int64{1, 1}, 1e-4},
		{"epsilon zero", []int64{1, 1}, []int64{1, 1}, 0},
		{"epsilon one", []int64{1, 1}, []int64{1, 1}, 1},
		{"epsilon NaN", []int64{1, 1}, []int64{1, 1}, math.NaN()},
	} {
		if _, err := PSI(c.e, c.a, c.eps); err == nil {
			t.Errorf("PSI %s: no error", c.name)
		}
	}
}

func TestPSIProperties(t *testing.T) {
	e, a := []int64{500, 300, 0, 200}, []int64{100, 350, 40, 510}
	ea, err := PSI(e, a, 1e-4)
	if err != nil {
		t.Fatal(err)
	}
	ae, err := PSI(a, e, 1e-4)
	if err != nil {
		t.Fatal(err)
	}
	// (a−e)·ln(a/e) is symmetric in a and e and never negative (follows
	// from the formula).
	if ea != ae || ea <= 0 {
		t.Errorf("PSI(e, a) = %g, PSI(a, e) = %g; want equal and positive", ea, ae)
	}
	same, err := PSI(e, []int64{1000, 600, 0, 400}, 1e-4)
	if err != nil || same != 0 {
		t.Errorf("PSI of equal shares = %g, %v; want 0", same, err)
	}
}

func TestJensenShannonErrors(t *testing.T) {
	for _, c := range []struct {
		name string
		p, q []float64
	}{
		{"lengths differ", []float64{1, 2}, []float64{1}},
		{"empty", nil, nil},
		{"negative", []float64{1, -1}, []float64{1, 1}},
		{"NaN", []float64{1, math.NaN()}, []float64{1, 1}},
		{"infinite", []float64{1, math.Inf(1)}, []float64{1, 1}},
		{"zero sum", []float64{0, 0}, []float64{1, 1}},
		{"sum overflows", []float64{math.MaxFloat64, math.MaxFloat64}, []float64{1, 1}},
	} {
		if _, err := JensenShannon(c.p, c.q); err == nil {
			t.Errorf("JensenShannon %s: no error", c.name)
		}
	}
}

func TestJensenShannonProperties(t *testing.T) {
	p, q := []float64{0.1, 0.4, 0, 0.5}, []float64{3, 1, 1, 0}
	pq, _ := JensenShannon(p, q)
	qp, _ := JensenShannon(q, p)
	// Symmetric, and bounded by √ln 2 with natural logarithms, reached by
	// disjoint supports (follows from the definition).
	if pq != qp || pq <= 0 || pq >= math.Sqrt(math.Ln2) {
		t.Errorf("JensenShannon(p, q) = %g, (q, p) = %g", pq, qp)
	}
	disjoint, _ := JensenShannon([]float64{1, 0}, []float64{0, 1})
	if !near(disjoint, math.Sqrt(math.Ln2), 1e-15, 0) {
		t.Errorf("disjoint supports: %g, want √ln 2 = %g", disjoint, math.Sqrt(math.Ln2))
	}
	same, _ := JensenShannon(p, []float64{0.2, 0.8, 0, 1})
	if same != 0 {
		t.Errorf("proportional inputs: %g, want 0", same)
	}
}
