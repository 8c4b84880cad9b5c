package windows_test

import (
	"bytes"
	"fmt"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// capsTracker holds models × classes at the configuration defaults (README.md
// "Configuration": windows 1h, 1d and 7d-matured), every cell of every
// window non-zero, every figure defined: the largest scrape the default
// caps (max_models 100, max_classes 50) allow.
func capsTracker(tb testing.TB, models, classes, maxSeries int) *windows.Tracker {
	tb.Helper()
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultWindows: []windows.Window{
			{Name: "1h", Length: time.Hour},
			{Name: "1d", Length: 24 * time.Hour},
			{Name: "7d-matured", Length: 7 * 24 * time.Hour, Lag: 3 * 24 * time.Hour},
		},
		MaxSeries: maxSeries,
	})
	if err != nil {
		tb.Fatal(err)
	}
	names := make([]string, classes)
	for i := range names {
		names[i] = fmt.Sprintf("class-%02d", i)
	}
	wm := t0.Add(10 * 24 * time.Hour)
	for m := range models {
		model := fmt.Sprintf("model-%03d", m)
		tr.SetClasses(model, names)
		var ch store.Changes
		// One bucket in 1h and 1d, one in 7d-matured.
		for _, bucket := range []time.Time{wm.Add(-30 * time.Minute), wm.Add(-4 * 24 * time.Hour)} {
			for a, actual := range names {
				for p, predicted := range names {
					ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: bucket, Actual: actual, Predicted: predicted, N: int64(1 + (a+p)%3)})
				}
				ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: bucket, Predicted: actual, N: int64(3 * classes)})
			}
		}
		tr.Apply(ch, map[string]time.Time{model: wm.Add(-time.Minute)})
	}
	return tr
}

// TestScrapeSizeAtDefaultCaps checks that a scrape at the default caps
// stays under 10 MB of Prometheus text with the default series budget.
// Without a budget (MaxSeries −1, as before there was one) the same
// scrape has 888,200 series and 84 MB.
func TestScrapeSizeAtDefaultCaps(t *testing.T) {
	if testing.Short() {
		t.Skip("builds 100 models × 50 classes")
	}
	tr := capsTracker(t, 100, 50, 0)
	text := exposition(t, windows.NewGatherer(tr, 0.95))
	series := bytes.Count(text, []byte("\n")) - 2*bytes.Count(text, []byte("\n# TYPE"))
	t.Logf("default budget: %d series, %.1f MB", series, float64(len(text))/1e6)
	if len(text) > 10e6 {
		t.Errorf("scrape is %.1f MB, want at most 10 MB", float64(len(text))/1e6)
	}
	if series > windows.DefaultMaxSeries+100 {
		t.Errorf("scrape has %d series, want at most %d plus one per model", series, windows.DefaultMaxSeries)
	}
}

// scrapeSeries parses a text exposition into its series (name and
// labels) and values, leaving out classwatch_scrape_omitted_series, which
// it returns by model.
func scrapeSeries(t *testing.T, text []byte) (series map[string]string, omitted map[string]int) {
	t.Helper()
	series, omitted = make(map[string]string), make(map[string]int)
	for _, line := range strings.Split(string(text), "\n") {
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		if m, ok := strings.CutPrefix(line[:i], `classwatch_scrape_omitted_series{model="`); ok {
			n, err := strconv.Atoi(line[i+1:])
			if err != nil {
				t.Fatal(err)
			}
			omitted[strings.TrimSuffix(m, `"}`)] = n
			continue
		}
		series[line[:i]] = line[i+1:]
	}
	return series, omitted
}

var modelLabel = regexp.MustCompile(`model="([^"]*)"`)

// TestSeriesBudgetOrder scrapes the golden scenario under every budget from
// 1 to its full size and checks the documented bound and order: at most
// the budget's series (besides classwatch_scrape_omitted_series), each one
// as in the full scrape; per model, the omitted count is what is missing;
// and a model keeps a zero cell only with all its non-zero cells, a cell
// only with all its per-class series, and a per-class series only with all
// its window series.
func TestSeriesBudgetOrder(t *testing.T) {
	full, _ := scrapeSeries(t, exposition(t, windows.NewGatherer(goldenTrackerWith(t, -1), 0.95)))
	tier := func(s, value string) int {
		switch {
		case strings.HasPrefix(s, "classwatch_confusion{") && value == "0":
			return 3
		case strings.HasPrefix(s, "classwatch_confusion{"):
			return 2
		case strings.Contains(s, `class="`):
			return 1
		}
		return 0
	}
	for budget := 1; budget <= len(full); budget++ {
		got, omitted := scrapeSeries(t, exposition(t, windows.NewGatherer(goldenTrackerWith(t, budget), 0.95)))
		if len(got) > budget {
			t.Fatalf("budget %d: %d series", budget, len(got))
		}
		// have[model][tier] and want[model][tier] count series.
		have, want := map[string]*[4]int{}, map[string]*[4]int{}
		for s, v := range full {
			m := modelLabel.FindStringSubmatch(s)[1]
			if want[m] == nil {
				want[m], have[m] = new([4]int), new([4]int)
			}
			want[m][tier(s, v)]++
			if gv, ok := got[s]; ok {
				if gv != v {
					t.Fatalf("budget %d: %s = %s, want %s", budget, s, gv, v)
				}
				have[m][tier(s, v)]++
			}
		}
		for m := range want {
			missing := 0
			for k := range 4 {
				missing += want[m][k] - have[m][k]
				if k > 0 && have[m][k] > 0 && have[m][k-1] < want[m][k-1] {
					t.Fatalf("budget %d: model %s has tier %d series without all of tier %d", budget, m, k, k-1)
				}
				if have[m][k] > 0 && have[m][k] < want[m][k] { // a tier is whole or absent
					t.Fatalf("budget %d: model %s has %d of %d tier %d series", budget, m, have[m][k], want[m][k], k)
				}
			}
			if omitted[m] != missing {
				t.Errorf("budget %d: model %s omitted %d, want %d", budget, m, omitted[m], missing)
			}
		}
	}
	if n := len(full); n < 100 {
		t.Fatalf("golden scrape has only %d series", n)
	}
}

// TestScrapeSeriesBound checks the bound cmd warns with against a real
// scrape in which every cell is non-zero and every figure the tracker can
// define is defined: they must agree exactly.
func TestScrapeSeriesBound(t *testing.T) {
	tr := capsTracker(t, 3, 4, -1)
	series, _ := scrapeSeries(t, exposition(t, windows.NewGatherer(tr, 0.95)))
	shapes := []windows.ModelShape{{Classes: 4, Windows: 3}, {Classes: 4, Windows: 3}, {Classes: 4, Windows: 3}}
	bound, ok := windows.ScrapeSeriesBound(shapes)
	// The tracker has no scores and no reference window: per window, the
	// Brier score and calibration error and the 5 early-warning series per
	// class (estimate, its bounds, estimated precision, score shift) are
	// undefined.
	if early := 3 * 3 * (2 + 4*5); !ok || bound != len(series)+early {
		t.Errorf("bound = %d, %v; the full scrape has %d series plus %d undefined", bound, ok, len(series), early)
	}
	if err := windows.CheckScrapeBudget(shapes, bound); err != nil {
		t.Errorf("budget %d = bound: %v", bound, err)
	}
	if err := windows.CheckScrapeBudget(shapes, bound-1); err == nil {
		t.Errorf("budget %d < bound %d: no error", bound-1, bound)
	}
	if err := windows.CheckScrapeBudget(append(shapes, windows.ModelShape{Windows: 1}), 0); err == nil {
		t.Error("a model without a class cap: no error")
	}
	// The default caps (README.md "Configuration") exceed the default budget.
	caps := make([]windows.ModelShape, 100)
	for i := range caps {
		caps[i] = windows.ModelShape{Classes: 50, Windows: 3}
	}
	if err := windows.CheckScrapeBudget(caps, 0); err == nil {
		t.Error("100 models × 50 classes × 3 windows: no error")
	} else {
		t.Log(err)
	}
}
