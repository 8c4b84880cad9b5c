package stats

import (
	"math"
	"testing"
)

func TestHomogeneityErrors(t *testing.T) {
	for _, c := range []struct {
		name string
		a, b []int64
	}{
		{"lengths differ", []int64{1, 2}, []int64{1}},
		{"empty", nil, nil},
		{"negative", []int64{1, -1}, []int64{1, 1}},
		{"a has no counts", []int64{0, 0}, []int64{3, 4}},
		{"b has no counts", []int64{3, 4}, []int64{0, 0}},
	} {
		if _, err := ChiSquare(c.a, c.b); err == nil {
			t.Errorf("ChiSquare %s: no error", c.name)
		}
		if _, err := GTest(c.a, c.b); err == nil {
			t.Errorf("GTest %s: no error", c.name)
		}
	}
}

func TestHomogeneityDropsEmptyCategories(t *testing.T) {
	for _, fn := range []func(a, b []int64) (Test, error){ChiSquare, GTest} {
		got, err := fn([]int64{0, 5, 0, 3, 0}, []int64{0, 2, 0, 9, 0})
		if err != nil {
			t.Fatal(err)
		}
		want, err := fn([]int64{5, 3}, []int64{2, 9})
		if err != nil {
			t.Fatal(err)
		}
		if got != want {
			t.Errorf("with empty categories %+v, without %+v", got, want)
		}
		// One category left: nothing to compare (as scipy's dof = 0 case).
		one, err := fn([]int64{0, 4}, []int64{0, 6})
		if err != nil || one != (Test{Statistic: 0, DF: 0, P: 1}) {
			t.Errorf("single category: %+v, %v; want {0 0 1}", one, err)
		}
	}
}

func TestChiSquareEqualsSquaredScore(t *testing.T) {
	// For a 2×2 table Pearson's X² without continuity correction is the
	// square of the pooled two-proportion z statistic (follows from the
	// definitions; common practice).
	for _, c := range [][4]int64{{56, 70, 48, 80}, {9, 10, 3, 10}, {1, 1000, 7, 900}} {
		x1, n1, x2, n2 := c[0], c[1], c[2], c[3]
		chi, err := ChiSquare([]int64{x1, n1 - x1}, []int64{x2, n2 - x2})
		if err != nil {
			t.Fatal(err)
		}
		cmp, err := TwoProportion(x1, n1, x2, n2, 0.95)
		if err != nil {
			t.Fatal(err)
		}
		if !near(chi.Statistic, cmp.Z*cmp.Z, 1e-12, 0) || !near(chi.P, cmp.P, 1e-10, 0) {
			t.Errorf("%v: X² %g (P %g), z² %g (P %g)", c, chi.Statistic, chi.P, cmp.Z*cmp.Z, cmp.P)
		}
	}
}

func TestHomogeneityIdenticalShares(t *testing.T) {
	got, err := GTest([]int64{10, 20, 30}, []int64{20, 40, 60})
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(got.Statistic) > 1e-12 || got.DF != 2 || math.Abs(got.P-1) > 1e-12 {
		t.Errorf("GTest of proportional vectors = %+v, want statistic 0, DF 2, P 1", got)
	}
}
