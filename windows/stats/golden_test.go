package stats

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"testing"
)

// reference is windows/testdata/reference/stats.json, written by gen.py from
// the libraries named in Versions.
type reference struct {
	Versions  map[string]string `json:"versions"`
	Intervals []struct {
		X          int64      `json:"x"`
		N          int64      `json:"n"`
		Confidence float64    `json:"confidence"`
		Wilson     [2]float64 `json:"wilson"`
		Jeffreys   [2]float64 `json:"jeffreys"`
	} `json:"intervals"`
	Newcombe []struct {
		X                 int64      `json:"x"`
		N                 int64      `json:"n"`
		StatsmodelsWilson [2]float64 `json:"statsmodels_wilson"`
	} `json:"newcombe_1998"`
	NewcombeDifference []struct {
		X1                 int64      `json:"x1"`
		N1                 int64      `json:"n1"`
		X2                 int64      `json:"x2"`
		N2                 int64      `json:"n2"`
		StatsmodelsNewcomb [2]float64 `json:"statsmodels_newcomb"`
	} `json:"newcombe_1998_difference"`
	Homogeneity []struct {
		A         []int64 `json:"a"`
		B         []int64 `json:"b"`
		ChiSquare refTest `json:"chi_square"`
		G         refTest `json:"g"`
	} `json:"homogeneity"`
	JensenShannon []struct {
		P        []float64 `json:"p"`
		Q        []float64 `json:"q"`
		Distance float64   `json:"distance"`
	} `json:"jensen_shannon"`
	PSI []struct {
		Expected []int64 `json:"expected"`
		Actual   []int64 `json:"actual"`
		Epsilon  float64 `json:"epsilon"`
		PSI      float64 `json:"psi"`
	} `json:"psi"`
	TwoProportion []struct {
		X1         int64    `json:"x1"`
		N1         int64    `json:"n1"`
		X2         int64    `json:"x2"`
		N2         int64    `json:"n2"`
		Confidence float64  `json:"confidence"`
		Lo         float64  `json:"lo"`
		Hi         float64  `json:"hi"`
		Diff       float64  `json:"diff"`
		Z          *float64 `json:"z"`
		P          *float64 `json:"p"`
		PLess      *float64 `json:"p_less"`
	} `json:"two_proportion"`
	BenjaminiHochberg []struct {
		P      []float64 `json:"p"`
		Q      float64   `json:"q"`
		Reject []bool    `json:"reject"`
	} `json:"benjamini_hochberg"`
}

type refTest struct {
	Statistic float64 `json:"statistic"`
	P         float64 `json:"p"`
	DF        int     `json:"df"`
}

func loadReference(t *testing.T) reference {
	t.Helper()
	raw, err := os.ReadFile("../testdata/reference/stats.json")
	if err != nil {
		t.Fatal(err)
	}
	var ref reference
	if err := json.Unmarshal(raw, &ref); err != nil {
		t.Fatal(err)
	}
	if ref.Versions["statsmodels"] == "" || ref.Versions["scipy"] == "" {
		t.Fatalf("stats.json records no library versions: %v", ref.Versions)
	}
	return ref
}

// Tolerances. Agreement is relative (relTol); absTol is a floor for figures
// that are zero or result from cancellation, where a relative error means
// nothing: statsmodels' Wilson bound at x = 0 is ±1e-18 rather than 0.
const (
	relTol = 1e-12
	absTol = 1e-15
)

// near reports whether got agrees with want to rel relative or abs absolute.
func near(got, want, rel, abs float64) bool {
	return math.Abs(got-want) <= max(rel*math.Abs(want), abs)
}

func check(t *testing.T, what string, got, want float64) {
	t.Helper()
	if !near(got, want, relTol, absTol) {
		t.Errorf("%s = %.17g, want %.17g (rel. diff %.2g)", what, got, want, math.Abs(got-want)/math.Abs(want))
	}
}

func TestWilsonJeffreysReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.Intervals {
		name := fmt.Sprintf("%d/%d@%g", c.X, c.N, c.Confidence)
		lo, hi, ok := Wilson(c.X, c.N, c.Confidence)
		if !ok {
			t.Fatalf("Wilson(%s) not ok", name)
		}
		// source: statsmodels 0.13.5 proportion_confint(method='wilson')
		check(t, "Wilson lo "+name, lo, c.Wilson[0])
		check(t, "Wilson hi "+name, hi, c.Wilson[1])
		lo, hi, ok = Jeffreys(c.X, c.N, c.Confidence)
		if !ok {
			t.Fatalf("Jeffreys(%s) not ok", name)
		}
		// source: statsmodels 0.13.5 proportion_confint(method='jeffreys'), i.e. scipy 1.10.1 beta.interval.
		// Looser for large n: gonum's incomplete beta loses about n·5e-15
		// relative (see Jeffreys); scipy's (Boost) does not.
		rel := max(relTol, 5e-15*float64(c.N))
		for i, got := range [2]float64{lo, hi} {
			if want := c.Jeffreys[i]; !near(got, want, rel, absTol) {
				t.Errorf("Jeffreys %s bound %d = %.17g, want %.17g (tolerance %.2g relative)", name, i, got, want, rel)
			}
		}
	}
}

func TestHomogeneityReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.Homogeneity {
		name := fmt.Sprintf("%v/%v", c.A, c.B)
		for _, tc := range []struct {
			test string
			fn   func(a, b []int64) (Test, error)
			want refTest
		}{
			// source: scipy 1.10.1 chi2_contingency(correction=False)
			{"ChiSquare", ChiSquare, c.ChiSquare},
			// source: scipy 1.10.1 chi2_contingency(correction=False, lambda_='log-likelihood')
			{"GTest", GTest, c.G},
		} {
			got, err := tc.fn(c.A, c.B)
			if err != nil {
				t.Fatalf("%s(%s): %v", tc.test, name, err)
			}
			if got.DF != tc.want.DF {
				t.Errorf("%s(%s).DF = %d, want %d", tc.test, name, got.DF, tc.want.DF)
			}
			check(t, tc.test+" statistic "+name, got.Statistic, tc.want.Statistic)
			check(t, tc.test+" P "+name, got.P, tc.want.P)
		}
	}
}

func TestJensenShannonReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.JensenShannon {
		got, err := JensenShannon(c.P, c.Q)
		if err != nil {
			t.Fatalf("JensenShannon(%v, %v): %v", c.P, c.Q, err)
		}
		// source: scipy 1.10.1 scipy.spatial.distance.jensenshannon (base e)
		check(t, fmt.Sprintf("JensenShannon(%v, %v)", c.P, c.Q), got, c.Distance)
	}
}

func TestPSIReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.PSI {
		got, err := PSI(c.Expected, c.Actual, c.Epsilon)
		if err != nil {
			t.Fatalf("PSI(%v, %v): %v", c.Expected, c.Actual, err)
		}
		// source: numpy 1.24.2, the PSI formula written out in gen.py (no library function)
		check(t, fmt.Sprintf("PSI(%v, %v, %g)", c.Expected, c.Actual, c.Epsilon), got, c.PSI)
	}
}

func TestTwoProportionReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.TwoProportion {
		name := fmt.Sprintf("%d/%d vs %d/%d @%g", c.X1, c.N1, c.X2, c.N2, c.Confidence)
		got, err := TwoProportion(c.X1, c.N1, c.X2, c.N2, c.Confidence)
		if err != nil {
			t.Fatalf("TwoProportion(%s): %v", name, err)
		}
		check(t, "Diff "+name, got.Diff, c.Diff)
		// source: statsmodels 0.13.5 confint_proportions_2indep(method='newcomb', compare='diff')
		check(t, "Lo "+name, got.Lo, c.Lo)
		check(t, "Hi "+name, got.Hi, c.Hi)
		if c.Z == nil {
			// statsmodels gives NaN when the pooled proportion is 0 or 1;
			// TwoProportion's documented convention is Z = 0, P = PLess = 1.
			if got.Z != 0 || got.P != 1 || got.PLess != 1 {
				t.Errorf("TwoProportion(%s) = Z %g, P %g, PLess %g; want 0, 1, 1", name, got.Z, got.P, got.PLess)
			}
			continue
		}
		// source: statsmodels 0.13.5 proportions_ztest (pooled), alternative 'two-sided' and 'smaller'
		check(t, "Z "+name, got.Z, *c.Z)
		check(t, "P "+name, got.P, *c.P)
		check(t, "PLess "+name, got.PLess, *c.PLess)
	}
}

func TestBenjaminiHochbergReference(t *testing.T) {
	ref := loadReference(t)
	for _, c := range ref.BenjaminiHochberg {
		got := BenjaminiHochberg(c.P, c.Q)
		// source: statsmodels 0.13.5 multipletests(method='fdr_bh')
		if fmt.Sprint(got) != fmt.Sprint(c.Reject) {
			t.Errorf("BenjaminiHochberg(%v, %g) = %v, want %v", c.P, c.Q, got, c.Reject)
		}
	}
}
