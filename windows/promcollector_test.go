package windows_test

import (
	"bytes"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/prometheus/common/expfmt"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
)

var updateMetrics = flag.Bool("update-metrics", false, "rewrite the golden exposition text in testdata/metrics")

const scrapeGolden = "testdata/metrics/scrape.prom"

// goldenTracker holds a small fixed scenario: a parcel-sorting line at a
// fictional warehouse with a lagged window, a support desk router whose
// predictions have no labels yet, and a configured model with no traffic.
func goldenTracker(t testing.TB) *windows.Tracker {
	t.Helper()
	return goldenTrackerWith(t, 0)
}

// goldenTrackerWith is goldenTracker with a series budget.
func goldenTrackerWith(t testing.TB, maxSeries int) *windows.Tracker {
	t.Helper()
	tr, err := windows.NewTracker(windows.TrackerOptions{
		MaxSeries: maxSeries,
		Models: []windows.ModelOptions{
			{Name: "parcel-sorter", Windows: []windows.Window{
				{Name: "1h", Length: time.Hour},
				{Name: "2h-matured", Length: 2 * time.Hour, Lag: time.Hour},
			}},
			{Name: "line-7"},
		},
		DefaultBucket:  5 * time.Minute,
		DefaultWindows: []windows.Window{{Name: "30m", Length: 30 * time.Minute}},
	})
	if err != nil {
		t.Fatal(err)
	}
	tr.SetClasses("parcel-sorter", []string{"intact", "damaged", "mislabeled"})
	tr.SetClasses("desk-router", []string{"billing", "outage"})
	tr.SetClasses("line-7", []string{"ok", "dent"})

	at := func(hhmm string) time.Time {
		ts, err := time.Parse("2006-01-02 15:04", "2026-03-01 "+hhmm)
		if err != nil {
			t.Fatal(err)
		}
		return ts
	}
	var ch store.Changes
	cell := func(model, bucket, actual, predicted string, n int64) {
		ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: at(bucket), Actual: actual, Predicted: predicted, N: n})
	}
	pred := func(model, bucket, predicted string, n int64) {
		ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: at(bucket), Predicted: predicted, N: n})
	}
	// Watermark 14:00: window 1h is [13:00, 14:00), 2h-matured [11:00, 13:00).
	cell("parcel-sorter", "11:30", "intact", "intact", 40)
	cell("parcel-sorter", "11:30", "intact", "damaged", 3)
	cell("parcel-sorter", "11:30", "damaged", "damaged", 5)
	cell("parcel-sorter", "11:30", "damaged", "intact", 2)
	cell("parcel-sorter", "11:30", "mislabeled", "mislabeled", 1)
	pred("parcel-sorter", "11:30", "intact", 50)
	pred("parcel-sorter", "11:30", "damaged", 9)
	pred("parcel-sorter", "11:30", "mislabeled", 1)
	cell("parcel-sorter", "12:10", "intact", "intact", 30)
	cell("parcel-sorter", "12:10", "mislabeled", "intact", 2)
	cell("parcel-sorter", "12:10", "damaged", "damaged", 4)
	pred("parcel-sorter", "12:10", "intact", 35)
	pred("parcel-sorter", "12:10", "damaged", 4)
	cell("parcel-sorter", "13:05", "intact", "intact", 20)
	cell("parcel-sorter", "13:05", "damaged", "intact", 1)
	cell("parcel-sorter", "13:05", "damaged", "damaged", 2)
	cell("parcel-sorter", "13:05", "intact", "mislabeled", 1)
	pred("parcel-sorter", "13:05", "intact", 30)
	pred("parcel-sorter", "13:05", "damaged", 3)
	pred("parcel-sorter", "13:05", "mislabeled", 2)
	cell("parcel-sorter", "13:40", "intact", "intact", 10)
	pred("parcel-sorter", "13:40", "intact", 12)
	// Predictions only, no label yet: counts defined, most ratios not.
	pred("desk-router", "09:20", "billing", 4)
	pred("desk-router", "09:20", "outage", 1)
	tr.Apply(ch, map[string]time.Time{"parcel-sorter": at("13:58"), "desk-router": at("09:21")})
	return tr
}

// checked returns tr's gatherer behind prometheus.Gatherers, which checks
// every series as a registry would (label names and values, duplicate
// series, help and type) and fails the gather if one is wrong.
func checked(tr *windows.Tracker) prometheus.Gatherer {
	return prometheus.Gatherers{windows.NewGatherer(tr, 0.95)}
}

// exposition gathers g and encodes it as Prometheus text.
func exposition(t testing.TB, g prometheus.Gatherer) []byte {
	t.Helper()
	mfs, err := g.Gather()
	if err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	enc := expfmt.NewEncoder(&buf, expfmt.NewFormat(expfmt.TypeTextPlain))
	for _, mf := range mfs {
		if err := enc.Encode(mf); err != nil {
			t.Fatal(err)
		}
	}
	return buf.Bytes()
}

// TestGathererGolden compares a scrape with testdata/metrics/scrape.prom.
// The golden file's counts follow from the scenario above; its ratios and
// intervals were checked independently against scikit-learn and
// statsmodels by TestGathererGoldenAgainstReference.
func TestGathererGolden(t *testing.T) {
	reg := checked(goldenTracker(t))
	if *updateMetrics {
		if err := os.WriteFile(scrapeGolden, exposition(t, reg), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	f, err := os.Open(scrapeGolden)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if err := testutil.GatherAndCompare(reg, f); err != nil {
		t.Error(err)
	}
}

// TestGathererGoldenAgainstReference recomputes every ratio of the golden
// file from its counts with scikit-learn 1.2 (precision_recall_fscore_support,
// balanced_accuracy_score, f1_score, multilabel_confusion_matrix) and
// statsmodels 0.13 (proportion_confint, method="wilson"), Debian bookworm's
// python3-sklearn and python3-statsmodels, and checks that exactly the
// defined ratios are present.
func TestGathererGoldenAgainstReference(t *testing.T) {
	python := "/usr/bin/python3"
	probe := exec.Command(python, "-c", "import sklearn, statsmodels")
	if err := probe.Run(); err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatalf("python3 with scikit-learn and statsmodels is required in CI: %v", err)
		}
		t.Skipf("python3 with scikit-learn and statsmodels not available: %v", err)
	}
	out, err := exec.Command(python, "testdata/metrics/check.py", scrapeGolden).CombinedOutput()
	if err != nil {
		t.Fatalf("check.py: %v\n%s", err, out)
	}
	t.Logf("%s", out)
}

// TestGathererPromtool lints a scrape with promtool check metrics.
func TestGathererPromtool(t *testing.T) {
	checkPromtool(t, exposition(t, checked(goldenTracker(t))))
}

// checkPromtool lints a scrape with promtool check metrics; without
// promtool it skips the test, or fails it in CI.
func checkPromtool(t *testing.T, text []byte) {
	t.Helper()
	promtool, err := exec.LookPath("promtool")
	if err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatal("promtool is required in CI")
		}
		t.Skip("promtool not installed")
	}
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = bytes.NewReader(text)
	if out, err := cmd.CombinedOutput(); err != nil || len(bytes.TrimSpace(out)) > 0 {
		t.Errorf("promtool check metrics: %v\n%s", err, out)
	}
}

// TestGathererNoStaleSeries checks that figures which stop being defined
// disappear from the next scrape while the counts stay, zeros included.
func TestGathererNoStaleSeries(t *testing.T) {
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultWindows: []windows.Window{{Name: "1h", Length: time.Hour}},
	})
	if err != nil {
		t.Fatal(err)
	}
	tr.SetClasses("line-7", []string{"ok", "dent"})
	tr.Apply(store.Changes{
		Cells:     []store.CellDelta{{Model: "line-7", Bucket: t0, Actual: "dent", Predicted: "dent", N: 3}},
		Predicted: []store.PredictedDelta{{Model: "line-7", Bucket: t0, Predicted: "dent", N: 3}},
	}, map[string]time.Time{"line-7": t0})
	reg := checked(tr)

	series := func(name string) int {
		t.Helper()
		n, err := testutil.GatherAndCount(reg, name)
		if err != nil {
			t.Fatal(err)
		}
		return n
	}
	// Only dent has support and predictions.
	if got, want := series("classwatch_recall_ratio"), 1; got != want {
		t.Errorf("recall series before = %d, want %d", got, want)
	}
	if got, want := series("classwatch_precision_ratio"), 1; got != want {
		t.Errorf("precision series before = %d, want %d", got, want)
	}
	// Two hours later the dent bucket has left the window.
	tr.Apply(store.Changes{}, map[string]time.Time{"line-7": t0.Add(2 * time.Hour)})
	for _, name := range []string{"classwatch_recall_ratio", "classwatch_recall_lower_ratio", "classwatch_precision_ratio", "classwatch_accuracy_ratio", "classwatch_label_coverage_ratio"} {
		if got := series(name); got != 0 {
			t.Errorf("%s: %d stale series after the window emptied", name, got)
		}
	}
	if got, want := series("classwatch_confusion"), 4; got != want {
		t.Errorf("confusion series = %d, want %d (every cell, zeros included)", got, want)
	}
	const want = `
# HELP classwatch_window_labeled Predictions made in the window that have a label.
# TYPE classwatch_window_labeled gauge
classwatch_window_labeled{model="line-7",window="1h"} 0
`
	if err := testutil.GatherAndCompare(reg, strings.NewReader(want), "classwatch_window_labeled"); err != nil {
		t.Error(err)
	}
}

// randomTracker holds models × classes × 4 windows over three days of
// 5-minute buckets, 20 random predictions per bucket, all labeled.
func randomTracker(tb testing.TB, models, classes int) *windows.Tracker {
	tb.Helper()
	tr, err := windows.NewTracker(windows.TrackerOptions{
		DefaultWindows: []windows.Window{
			{Name: "1h", Length: time.Hour},
			{Name: "6h", Length: 6 * time.Hour},
			{Name: "1d", Length: 24 * time.Hour},
			{Name: "2d-matured", Length: 48 * time.Hour, Lag: 24 * time.Hour},
		},
	})
	if err != nil {
		tb.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	names := make([]string, classes)
	for i := range names {
		names[i] = fmt.Sprintf("class-%02d", i)
	}
	for m := range models {
		model := fmt.Sprintf("model-%02d", m)
		tr.SetClasses(model, names)
		var ch store.Changes
		for k := range 72 * 12 { // three days of 5m buckets
			bucket := t0.Add(time.Duration(k) * 5 * time.Minute)
			for range 20 {
				a, p := names[rng.IntN(classes)], names[rng.IntN(classes)]
				ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: bucket, Actual: a, Predicted: p, N: 1})
				ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: bucket, Predicted: p, N: 2})
			}
		}
		tr.Apply(ch, map[string]time.Time{model: t0.Add(72 * time.Hour)})
	}
	return tr
}

// TestGathererOrder checks that the gatherer's families come out exactly as
// a registry would return them: prometheus.Gatherers checks every series
// and sorts families by name and series by label values, so its output
// differs from the gatherer's own if any series was out of order.
func TestGathererOrder(t *testing.T) {
	for name, tr := range map[string]*windows.Tracker{
		"golden": goldenTracker(t),
		"random": randomTracker(t, 12, 5),
	} {
		t.Run(name, func(t *testing.T) {
			got := exposition(t, windows.NewGatherer(tr, 0.95))
			want := exposition(t, checked(tr))
			if !bytes.Equal(got, want) {
				t.Errorf("gatherer's order differs from the registry's:\n%s", firstDiff(got, want))
			}
		})
	}
}

// firstDiff shows the first line where got and want differ.
func firstDiff(got, want []byte) string {
	g, w := strings.Split(string(got), "\n"), strings.Split(string(want), "\n")
	for i := range min(len(g), len(w)) {
		if g[i] != w[i] {
			return fmt.Sprintf("line %d:\n got %s\nwant %s", i+1, g[i], w[i])
		}
	}
	return fmt.Sprintf("got %d lines, want %d", len(g), len(w))
}

// TestMergeGatherers checks that families of several gatherers are merged
// by name, and that a name gathered twice is reported and kept once.
func TestMergeGatherers(t *testing.T) {
	reg := prometheus.NewPedanticRegistry()
	up := prometheus.NewGauge(prometheus.GaugeOpts{Name: "classwatch_window_zzz_test", Help: "A test gauge."})
	early := prometheus.NewGauge(prometheus.GaugeOpts{Name: "aaa_test", Help: "A test gauge."})
	reg.MustRegister(up, early)
	tr := goldenTracker(t)

	mfs, err := windows.MergeGatherers(windows.NewGatherer(tr, 0.95), reg).Gather()
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, mf := range mfs {
		names = append(names, mf.GetName())
	}
	if !slices.IsSorted(names) {
		t.Errorf("merged families not sorted by name: %v", names)
	}
	if got, want := len(names), 2+23; got != want {
		t.Errorf("merged %d families, want %d: %v", got, want, names)
	}

	dup := prometheus.NewRegistry()
	dup.MustRegister(prometheus.NewGauge(prometheus.GaugeOpts{Name: "classwatch_confusion", Help: "Another help."}))
	mfs, err = windows.MergeGatherers(windows.NewGatherer(tr, 0.95), dup).Gather()
	if err == nil || !strings.Contains(err.Error(), "classwatch_confusion gathered twice") {
		t.Errorf("error = %v, want classwatch_confusion gathered twice", err)
	}
	for _, mf := range mfs {
		if mf.GetName() == "classwatch_confusion" && len(mf.Metric) == 1 {
			t.Error("the second classwatch_confusion family was kept, want the first")
		}
	}
}

// BenchmarkScrape measures one scrape of 50 models × 12 classes × 4
// windows (about 52,000 series) as the daemon serves it, next to a
// registry with the Go and process collectors: Gather alone, and a GET of
// /metrics over loopback HTTP as plain text and as Prometheus asks for it
// (OpenMetrics, gzip). Besides the mean it reports the median and the
// slowest scrape.
func BenchmarkScrape(b *testing.B) {
	tr := randomTracker(b, 50, 12)
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	metrics := windows.MergeGatherers(reg, windows.NewGatherer(tr, 0.95))
	h := api.MetricsHandler(metrics, promhttp.HandlerOpts{ErrorHandling: promhttp.HTTPErrorOnError, EnableOpenMetrics: true})
	b.Run("gather", func(b *testing.B) {
		latency(b, func() {
			if _, err := metrics.Gather(); err != nil {
				b.Fatal(err)
			}
		})
	})
	srv := httptest.NewServer(h)
	defer srv.Close()
	scrape := func(b *testing.B, accept, encoding string) {
		req, err := http.NewRequest(http.MethodGet, srv.URL, nil)
		if err != nil {
			b.Fatal(err)
		}
		req.Header.Set("Accept", accept)
		// Set by hand, Accept-Encoding also stops the client from
		// decompressing: the time is the server's, plus reading the bytes.
		req.Header.Set("Accept-Encoding", encoding)
		var size int64
		latency(b, func() {
			resp, err := srv.Client().Do(req)
			if err != nil {
				b.Fatal(err)
			}
			defer resp.Body.Close()
			if size, err = io.Copy(io.Discard, resp.Body); err != nil {
				b.Fatal(err)
			}
			if resp.StatusCode != http.StatusOK || resp.Header.Get("Content-Encoding") != encoding {
				b.Fatal(resp.Status, resp.Header)
			}
		})
		b.ReportMetric(float64(size)/1e6, "MB/scrape")
	}
	b.Run("http", func(b *testing.B) { scrape(b, "", "") })
	b.Run("prometheus", func(b *testing.B) { scrape(b, prometheusAccept, "gzip") })
}

// latency runs op in a benchmark loop and reports its mean, median and
// slowest run in milliseconds.
func latency(b *testing.B, op func()) {
	var runs []time.Duration
	for b.Loop() {
		start := time.Now()
		op()
		runs = append(runs, time.Since(start))
	}
	slices.Sort(runs)
	ms := func(d time.Duration) float64 { return d.Seconds() * 1e3 }
	b.ReportMetric(ms(b.Elapsed())/float64(b.N), "ms/op")
	b.ReportMetric(ms(runs[len(runs)/2]), "p50-ms")
	b.ReportMetric(ms(runs[len(runs)-1]), "max-ms")
}

// prometheusAccept is the Accept header Prometheus sends when scraping
// (from memory of its scrape code; OpenMetrics preferred, text accepted).
const prometheusAccept = "application/openmetrics-text;version=1.0.0,application/openmetrics-text;version=0.0.1;q=0.75,text/plain;version=0.0.4;q=0.5,*/*;q=0.1"
