package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"math"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// The end-to-end test builds the real binary, runs "classwatch serve" as a
// child process against each store, pushes the fixture of testdata/e2e over
// HTTP, and checks /metrics, the read API, "classwatch audit" and
// "classwatch verify" against figures that testdata/e2e/gen.py computed
// independently with scikit-learn and statsmodels.

// TestMain lets pgtest stop the throwaway PostgreSQL cluster it may start.
func TestMain(m *testing.M) { pgtest.Main(m) }

// e2eDir holds the fixture; gen.py writes all of it.
var e2eDir = filepath.Join("testdata", "e2e")

// relTol is the relative tolerance of figure comparisons: both sides are
// float64 results of the same formulas evaluated in a different order.
const relTol = 1e-9

// e2eFixture is testdata/e2e/expected.json.
type e2eFixture struct {
	Generator  string            `json:"generator"`
	Versions   map[string]string `json:"versions"`
	Model      string            `json:"model"`
	Classes    []string          `json:"classes"`
	Confidence float64           `json:"confidence"`
	Bucket     string            `json:"bucket"`
	Watermark  time.Time         `json:"watermark"`
	Ingest     struct {
		Predictions ingestSummary `json:"predictions"`
		LabelsEarly ingestSummary `json:"labels_early"`
		Labels      ingestSummary `json:"labels"`
	} `json:"ingest"`
	PredictionsReceived float64            `json:"predictions_received"`
	LabelResults        map[string]float64 `json:"label_results"`
	Windows             map[string]struct {
		figures
		From   time.Time `json:"from"`
		To     time.Time `json:"to"`
		Length string    `json:"length"`
		Lag    string    `json:"lag"`
	} `json:"windows"`
	Periods []struct {
		figures
		From    time.Time  `json:"from"`
		To      time.Time  `json:"to"`
		Segment *string    `json:"segment"`
		AsOf    *time.Time `json:"as_of"`
	} `json:"periods"`
}

// ingestSummary is what one POST must answer.
type ingestSummary struct {
	Accepted      int   `json:"accepted"`
	Duplicates    int   `json:"duplicates"`
	RejectedLines []int `json:"rejected_lines"`
}

// figures are a matrix and its metrics in the shape gen.py writes them;
// nil is undefined.
type figures struct {
	Matrix           [][]int64               `json:"matrix"`
	Predictions      int64                   `json:"predictions"`
	Labeled          int64                   `json:"labeled"`
	Accuracy         *float64                `json:"accuracy"`
	BalancedAccuracy *float64                `json:"balanced_accuracy"`
	MacroF1          *float64                `json:"macro_f1"`
	LabelCoverage    *float64                `json:"label_coverage"`
	MCC              *float64                `json:"mcc"`
	Kappa            *float64                `json:"kappa"`
	PerClass         map[string]classFigures `json:"per_class"`
}

// classFigures are one class's figures, with the JSON keys of both gen.py
// and the read API.
type classFigures struct {
	Support             int64       `json:"support"`
	Predictions         int64       `json:"predictions"`
	Recall              *float64    `json:"recall"`
	Precision           *float64    `json:"precision"`
	Specificity         *float64    `json:"specificity"`
	F1                  *float64    `json:"f1"`
	Prevalence          *float64    `json:"prevalence"`
	PredictedShare      *float64    `json:"predicted_share"`
	RecallInterval      *[2]float64 `json:"recall_interval"`
	PrecisionInterval   *[2]float64 `json:"precision_interval"`
	SpecificityInterval *[2]float64 `json:"specificity_interval"`
}

// apiFigures is the figures part of a read-API body (README.md "HTTP API"): the
// overall metrics sit under "metrics".
type apiFigures struct {
	Classes     []string  `json:"classes"`
	Matrix      [][]int64 `json:"matrix"`
	Predictions int64     `json:"predictions"`
	Labeled     int64     `json:"labeled"`
	Metrics     struct {
		Accuracy         *float64                `json:"accuracy"`
		BalancedAccuracy *float64                `json:"balanced_accuracy"`
		MacroF1          *float64                `json:"macro_f1"`
		LabelCoverage    *float64                `json:"label_coverage"`
		MCC              *float64                `json:"mcc"`
		Kappa            *float64                `json:"kappa"`
		PerClass         map[string]classFigures `json:"per_class"`
	} `json:"metrics"`
}

func (a apiFigures) figures() figures {
	m := a.Metrics
	return figures{
		Matrix: a.Matrix, Predictions: a.Predictions, Labeled: a.Labeled,
		Accuracy: m.Accuracy, BalancedAccuracy: m.BalancedAccuracy, MacroF1: m.MacroF1,
		LabelCoverage: m.LabelCoverage, MCC: m.MCC, Kappa: m.Kappa, PerClass: m.PerClass,
	}
}

// matrixReport is the body of GET /v1/models/{model}/matrix and the output
// of "classwatch audit --format json".
type matrixReport struct {
	apiFigures
	Model   string    `json:"model"`
	From    time.Time `json:"from"`
	To      time.Time `json:"to"`
	AsOf    time.Time `json:"as_of"`
	Segment *string   `json:"segment"`
}

// ingestResponse is the body of POST /v1/predictions and /v1/labels.
type ingestResponse struct {
	Accepted   int `json:"accepted"`
	Duplicates int `json:"duplicates"`
	Rejected   []struct {
		Line  int    `json:"line"`
		Error string `json:"error"`
	} `json:"rejected"`
	Error string `json:"error"`
}

func TestE2E(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped with -short")
	}
	fx := loadE2EFixture(t)
	bin := buildBinary(t)

	for _, backend := range []struct {
		name string
		// database returns the config's database key; "" is SQLite.
		database func(tb testing.TB) string
	}{
		{"sqlite", func(testing.TB) string { return "" }},
		{"postgres", pgtest.URL},
	} {
		t.Run(backend.name, func(t *testing.T) {
			t.Parallel()
			cfg := writeE2EConfig(t, fx, backend.database(t))
			runE2EScenario(t, bin, cfg, fx)
		})
	}
}

// runE2EScenario is the whole scenario against one store: ingest over
// HTTP, the scrape, the read API, a graceful stop, then verify and audit.
func runE2EScenario(t *testing.T, bin, cfg string, fx e2eFixture) {
	d := startDaemon(t, bin, cfg)

	// Labels first: their predictions are unknown yet, so they wait.
	for _, post := range []struct {
		path, file string
		want       ingestSummary
	}{
		{"/v1/labels", "labels_early.ndjson", fx.Ingest.LabelsEarly},
		{"/v1/predictions", "predictions.ndjson", fx.Ingest.Predictions},
		{"/v1/labels", "labels.ndjson", fx.Ingest.Labels},
	} {
		checkIngest(t, d.url+post.path, filepath.Join(e2eDir, post.file), post.want)
	}

	text := scrape(t, d.url+"/metrics")
	checkWindowSeries(t, parseExposition(t, text), fx)
	checkPromtool(t, text)

	checkWindowsAPI(t, d.url, fx)
	for _, p := range fx.Periods {
		where := periodName(p.From, p.To, p.Segment, p.AsOf)
		got := getMatrix(t, d.url, fx.Model, p.From, p.To, p.Segment, p.AsOf)
		checkReport(t, "GET matrix "+where, got, fx, p.From, p.To, p.Segment, p.AsOf)
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(t, "GET matrix "+where, fx.Classes, got.figures(), p.figures)
	}
	checkMisaligned(t, d.url, fx)

	d.stop(t)

	out := runCommand(t, bin, "verify", "--config", cfg)
	if want := "verify: every count matches the raw rows"; !strings.Contains(out, want) {
		t.Errorf("classwatch verify printed %q, want a line %q", out, want)
	}
	for _, p := range fx.Periods {
		where := periodName(p.From, p.To, p.Segment, p.AsOf)
		args := []string{"audit", "--config", cfg, "--model", fx.Model, "--format", "json",
			"--from", p.From.Format(time.RFC3339), "--to", p.To.Format(time.RFC3339)}
		if p.Segment != nil {
			args = append(args, "--segment", *p.Segment)
		}
		if p.AsOf != nil {
			args = append(args, "--as-of", p.AsOf.Format(time.RFC3339))
		}
		var got matrixReport
		if err := json.Unmarshal([]byte(runCommand(t, bin, args...)), &got); err != nil {
			t.Fatalf("classwatch audit %s: decode output: %v", where, err)
		}
		checkReport(t, "audit "+where, got, fx, p.From, p.To, p.Segment, p.AsOf)
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(t, "audit "+where, fx.Classes, got.figures(), p.figures)
	}
}

func loadE2EFixture(tb testing.TB) e2eFixture {
	tb.Helper()
	data, err := os.ReadFile(filepath.Join(e2eDir, "expected.json"))
	if err != nil {
		tb.Fatal(err)
	}
	var fx e2eFixture
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&fx); err != nil {
		tb.Fatalf("decode expected.json: %v", err)
	}
	if len(fx.Windows) == 0 || len(fx.Periods) == 0 || len(fx.Classes) == 0 {
		tb.Fatalf("expected.json has no windows, periods or classes; rerun %s", fx.Generator)
	}
	return fx
}

// buildBinary builds this package's command once for the test.
func buildBinary(tb testing.TB) string {
	tb.Helper()
	bin := filepath.Join(tb.TempDir(), "classwatch")
	// "go test" runs with its own go command first on PATH.
	cmd := exec.Command("go", "build", "-o", bin, ".")
	if out, err := cmd.CombinedOutput(); err != nil {
		tb.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// writeE2EConfig writes the daemon's config: the fixture's model, bucket,
// confidence and windows, the event clock, and no limit on event times
// (the fixture's times are fixed, so they may lie ahead of the clock).
func writeE2EConfig(tb testing.TB, fx e2eFixture, database string) string {
	tb.Helper()
	dir := tb.TempDir()
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %q\n", filepath.Join(dir, "data"))
	fmt.Fprintf(&b, "database: %q\n", database)
	fmt.Fprintf(&b, "bucket: %s\nconfidence: %v\nclock: event\n", fx.Bucket, fx.Confidence)
	b.WriteString("windows:\n")
	for _, name := range sortedKeys(fx.Windows) {
		w := fx.Windows[name]
		fmt.Fprintf(&b, "  - {name: %q, length: %s, lag: %s}\n", name, w.Length, w.Lag)
	}
	fmt.Fprintf(&b, "models:\n  - name: %q\n    classes: [%s]\n", fx.Model, strings.Join(fx.Classes, ", "))
	b.WriteString("ingest: {max_future: 0}\n")
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(b.String()), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}

// childEnv is this process's environment without the variable that would
// override the config's database.
func childEnv() []string {
	return slices.DeleteFunc(os.Environ(), func(kv string) bool {
		return strings.HasPrefix(kv, databaseURLEnv+"=")
	})
}

// lockedBuffer collects a child's output while the test may read it.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// runningDaemon is a "classwatch serve" child process.
type runningDaemon struct {
	cmd    *exec.Cmd
	url    string // http://ADDR, no trailing slash
	stderr *lockedBuffer
	// done is closed when the process has exited; waitErr is then
	// cmd.Wait's result.
	done    chan struct{}
	waitErr error
}

// startDaemon runs "classwatch serve" on a free port and waits for the
// line announcing its address. The process is killed when tb ends unless
// stop ended it.
func startDaemon(tb testing.TB, bin, cfg string) *runningDaemon {
	tb.Helper()
	cmd := exec.Command(bin, "serve", "--config", cfg, "--listen", "127.0.0.1:0")
	cmd.Env = childEnv()
	d := &runningDaemon{cmd: cmd, stderr: &lockedBuffer{}, done: make(chan struct{})}
	cmd.Stderr = d.stderr
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		tb.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		tb.Fatalf("start classwatch serve: %v", err)
	}
	tb.Cleanup(func() {
		select {
		case <-d.done:
		default:
			_ = cmd.Process.Kill()
			<-d.done
		}
		if tb.Failed() {
			tb.Logf("classwatch serve stderr:\n%s", d.stderr)
		}
	})

	addr := make(chan string, 1)
	go func() {
		// Read every line, so the child never blocks on a full pipe, and
		// wait for the process only once stdout is drained, as exec asks.
		const prefix = "classwatch listening on "
		sc := bufio.NewScanner(stdout)
		for sc.Scan() {
			if u, ok := strings.CutPrefix(sc.Text(), prefix); ok {
				addr <- strings.TrimSuffix(u, "/")
			}
		}
		d.waitErr = cmd.Wait()
		close(d.done)
	}()
	select {
	case d.url = <-addr:
	case <-d.done:
		tb.Fatalf("classwatch serve exited before listening: %v\n%s", d.waitErr, d.stderr)
	case <-time.After(30 * time.Second):
		tb.Fatalf("classwatch serve did not print its address within 30s\n%s", d.stderr)
	}
	d.waitStarted(tb, 30*time.Second)
	return d
}

// waitStarted polls until the routes answer: the address is printed
// before the store is reached and the routes are wired, and until then
// every route but /healthz and /readyz answers 503. (/readyz itself may
// stay 503 afterwards, for example while a stream source is down.)
func (d *runningDaemon) waitStarted(tb testing.TB, limit time.Duration) {
	tb.Helper()
	deadline := time.Now().Add(limit)
	for {
		resp, err := http.Get(d.url + "/v1/models")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode != http.StatusServiceUnavailable {
				return
			}
		}
		select {
		case <-d.done:
			tb.Fatalf("classwatch serve exited before it started: %v\n%s", d.waitErr, d.stderr)
		case <-time.After(50 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			tb.Fatalf("classwatch serve not started within %s (last: %v)\n%s", limit, err, d.stderr)
		}
	}
}

// stop sends SIGTERM and expects a clean exit well within the daemon's
// own shutdown bound.
func (d *runningDaemon) stop(tb testing.TB) {
	tb.Helper()
	if err := d.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		tb.Fatalf("signal classwatch serve: %v", err)
	}
	select {
	case <-d.done:
		if d.waitErr != nil {
			tb.Errorf("classwatch serve after SIGTERM: %v, want exit status 0", d.waitErr)
		}
	case <-time.After(10 * time.Second):
		tb.Fatalf("classwatch serve still running 10s after SIGTERM")
	}
}

// runCommand runs a classwatch subcommand to completion and returns its
// stdout, failing tb unless it exits with status 0.
func runCommand(tb testing.TB, bin string, args ...string) string {
	tb.Helper()
	cmd := exec.Command(bin, args...)
	cmd.Env = childEnv()
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	if err := cmd.Run(); err != nil {
		tb.Fatalf("classwatch %s: %v, want exit status 0\nstdout:\n%s\nstderr:\n%s", strings.Join(args, " "), err, &stdout, &stderr)
	}
	return stdout.String()
}

// checkIngest posts an NDJSON file and checks the answer's counts and the
// rejected line numbers.
func checkIngest(tb testing.TB, target, file string, want ingestSummary) {
	tb.Helper()
	body, err := os.ReadFile(file)
	if err != nil {
		tb.Fatal(err)
	}
	resp, err := http.Post(target, "application/x-ndjson", bytes.NewReader(body))
	if err != nil {
		tb.Fatalf("POST %s: %v", file, err)
	}
	defer resp.Body.Close()
	var got ingestResponse
	if err := json.NewDecoder(resp.Body).Decode(&got); err != nil {
		tb.Fatalf("POST %s: decode answer: %v", file, err)
	}
	if resp.StatusCode != http.StatusOK {
		tb.Fatalf("POST %s: status %d (%s), want 200", file, resp.StatusCode, got.Error)
	}

	lines := 0
	for _, l := range strings.Split(string(body), "\n") {
		if strings.TrimSpace(l) != "" {
			lines++
		}
	}
	if n := got.Accepted + got.Duplicates + len(got.Rejected); n != lines {
		tb.Errorf("POST %s: accepted %d + duplicates %d + rejected %d = %d, want the %d lines sent",
			file, got.Accepted, got.Duplicates, len(got.Rejected), n, lines)
	}
	// source: the join semantics of windows/store/store.go, simulated by
	// testdata/e2e/gen.py
	if got.Accepted != want.Accepted || got.Duplicates != want.Duplicates {
		tb.Errorf("POST %s: accepted %d, duplicates %d; want %d, %d", file, got.Accepted, got.Duplicates, want.Accepted, want.Duplicates)
	}
	rejected := make([]int, len(got.Rejected))
	for i, r := range got.Rejected {
		rejected[i] = r.Line
		if r.Error == "" {
			tb.Errorf("POST %s: line %d rejected without an error message", file, r.Line)
		}
	}
	if !slices.Equal(rejected, want.RejectedLines) {
		tb.Errorf("POST %s: rejected lines %v, want %v", file, rejected, want.RejectedLines)
	}
}

func scrape(tb testing.TB, target string) string {
	tb.Helper()
	resp, err := http.Get(target)
	if err != nil {
		tb.Fatalf("scrape: %v", err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatalf("scrape: read body: %v", err)
	}
	if resp.StatusCode != http.StatusOK {
		tb.Fatalf("scrape: status %d\n%s", resp.StatusCode, body)
	}
	return string(body)
}

// exposition indexes a scrape's samples by family and labels.
type exposition map[string]map[string]float64

// labelKey renders a label set in name order, e.g. `class="wet",model="m"`.
func labelKey(labels map[string]string) string {
	parts := make([]string, 0, len(labels))
	for _, n := range sortedKeys(labels) {
		parts = append(parts, fmt.Sprintf("%s=%q", n, labels[n]))
	}
	return strings.Join(parts, ",")
}

func parseExposition(tb testing.TB, text string) exposition {
	tb.Helper()
	parser := expfmt.NewTextParser(model.LegacyValidation)
	families, err := parser.TextToMetricFamilies(strings.NewReader(text))
	if err != nil {
		tb.Fatalf("parse /metrics: %v", err)
	}
	out := exposition{}
	for name, mf := range families {
		out[name] = map[string]float64{}
		for _, m := range mf.GetMetric() {
			labels := map[string]string{}
			for _, lp := range m.GetLabel() {
				labels[lp.GetName()] = lp.GetValue()
			}
			out[name][labelKey(labels)] = sampleValue(mf.GetType(), m)
		}
	}
	return out
}

func sampleValue(t dto.MetricType, m *dto.Metric) float64 {
	switch t {
	case dto.MetricType_COUNTER:
		return m.GetCounter().GetValue()
	case dto.MetricType_GAUGE:
		return m.GetGauge().GetValue()
	default:
		return m.GetUntyped().GetValue()
	}
}

// checkSeries expects family{labels} to exist with value want, or to be
// absent when want is nil (an undefined ratio, README.md "Metric definitions").
func (e exposition) checkSeries(tb testing.TB, family string, labels map[string]string, want *float64) {
	tb.Helper()
	got, ok := e[family][labelKey(labels)]
	switch {
	case want == nil && ok:
		tb.Errorf("%s{%s} = %v, want the series absent (undefined)", family, labelKey(labels), got)
	case want != nil && !ok:
		tb.Errorf("%s{%s} is missing, want %v", family, labelKey(labels), *want)
	case want != nil && !nearlyEqual(got, *want):
		tb.Errorf("%s{%s} = %v, want %v", family, labelKey(labels), got, *want)
	}
}

// countSeries counts a family's series for one model.
func (e exposition) countSeries(family, modelName string) int {
	n := 0
	for key := range e[family] {
		if strings.Contains(key, fmt.Sprintf("model=%q", modelName)) {
			n++
		}
	}
	return n
}

// classSeries lists the {model,window,class} families of README.md "Prometheus metrics" (plus
// our per-class prediction count) with the figure each carries.
var classSeries = []struct {
	family string
	value  func(c classFigures) *float64
}{
	{"classwatch_recall_ratio", func(c classFigures) *float64 { return c.Recall }},
	{"classwatch_precision_ratio", func(c classFigures) *float64 { return c.Precision }},
	{"classwatch_specificity_ratio", func(c classFigures) *float64 { return c.Specificity }},
	{"classwatch_f1_ratio", func(c classFigures) *float64 { return c.F1 }},
	{"classwatch_prevalence_ratio", func(c classFigures) *float64 { return c.Prevalence }},
	{"classwatch_predicted_ratio", func(c classFigures) *float64 { return c.PredictedShare }},
	{"classwatch_recall_lower_ratio", func(c classFigures) *float64 { return bound(c.RecallInterval, 0) }},
	{"classwatch_recall_upper_ratio", func(c classFigures) *float64 { return bound(c.RecallInterval, 1) }},
	{"classwatch_window_class_predictions", func(c classFigures) *float64 { return asFloat(c.Predictions) }},
}

// windowSeries lists the {model,window} families of README.md "Prometheus metrics".
var windowSeries = []struct {
	family string
	value  func(f figures) *float64
}{
	{"classwatch_balanced_accuracy_ratio", func(f figures) *float64 { return f.BalancedAccuracy }},
	{"classwatch_accuracy_ratio", func(f figures) *float64 { return f.Accuracy }},
	{"classwatch_macro_f1_ratio", func(f figures) *float64 { return f.MacroF1 }},
	{"classwatch_label_coverage_ratio", func(f figures) *float64 { return f.LabelCoverage }},
	{"classwatch_window_predictions", func(f figures) *float64 { return asFloat(f.Predictions) }},
	{"classwatch_window_labeled", func(f figures) *float64 { return asFloat(f.Labeled) }},
}

func bound(iv *[2]float64, i int) *float64 {
	if iv == nil {
		return nil
	}
	return &iv[i]
}

// asFloat returns a count as a figure.
func asFloat(n int64) *float64 {
	v := float64(n)
	return &v
}

// checkWindowSeries compares every per-window series of README.md "Prometheus metrics" with the
// fixture, and the ingest counters with the outcomes gen.py simulated.
func checkWindowSeries(tb testing.TB, e exposition, fx e2eFixture) {
	tb.Helper()
	// present counts the series each family should have.
	present := map[string]int{}
	for _, s := range windowSeries {
		present[s.family] = 0
	}
	for _, s := range classSeries {
		present[s.family] = 0
	}
	for _, name := range sortedKeys(fx.Windows) {
		w := fx.Windows[name]
		win := map[string]string{"model": fx.Model, "window": name}

		// source: window bounds of README.md "Join semantics and windows", computed by testdata/e2e/gen.py
		e.checkSeries(tb, "classwatch_window_start_timestamp_seconds", win, asFloat(w.From.Unix()))
		e.checkSeries(tb, "classwatch_window_end_timestamp_seconds", win, asFloat(w.To.Unix()))

		// source: scikit-learn 1.2.1 confusion_matrix, accuracy_score,
		// balanced_accuracy_score, f1_score(average='macro') via
		// testdata/e2e/gen.py
		for a, actual := range fx.Classes {
			for p, predicted := range fx.Classes {
				cell := map[string]string{"model": fx.Model, "window": name, "actual": actual, "predicted": predicted}
				e.checkSeries(tb, "classwatch_confusion", cell, asFloat(w.Matrix[a][p]))
			}
		}
		for _, s := range windowSeries {
			want := s.value(w.figures)
			e.checkSeries(tb, s.family, win, want)
			if want != nil {
				present[s.family]++
			}
		}

		// source: scikit-learn 1.2.1 precision_recall_fscore_support and
		// statsmodels 0.13.5 proportion_confint(method='wilson') via
		// testdata/e2e/gen.py
		for _, class := range fx.Classes {
			labels := map[string]string{"model": fx.Model, "window": name, "class": class}
			for _, s := range classSeries {
				want := s.value(w.PerClass[class])
				e.checkSeries(tb, s.family, labels, want)
				if want != nil {
					present[s.family]++
				}
			}
		}
	}

	// No stray series: only the windows configured, each series once.
	n := len(fx.Classes)
	present["classwatch_confusion"] = len(fx.Windows) * n * n
	for family, want := range present {
		if got := e.countSeries(family, fx.Model); got != want {
			tb.Errorf("%s has %d series for model %s, want %d", family, got, fx.Model, want)
		}
	}

	// source: testdata/e2e/gen.py (watermark of README.md "Join semantics and windows")
	e.checkSeries(tb, "classwatch_watermark_timestamp_seconds", map[string]string{"model": fx.Model}, asFloat(fx.Watermark.Unix()))

	// source: the outcomes of the join semantics of windows/store/store.go,
	// simulated by testdata/e2e/gen.py
	e.checkSeries(tb, "classwatch_predictions_received_total", map[string]string{"model": fx.Model}, &fx.PredictionsReceived)
	for _, result := range sortedKeys(fx.LabelResults) {
		want := fx.LabelResults[result]
		e.checkSeries(tb, "classwatch_labels_received_total", map[string]string{"model": fx.Model, "result": result}, &want)
	}
	if _, ok := e["classwatch_labels_received_total"][labelKey(map[string]string{"model": fx.Model, "result": "rejected"})]; !ok {
		tb.Errorf("classwatch_labels_received_total{model=%q,result=\"rejected\"} is missing", fx.Model)
	}
}

// checkPromtool lints the scrape with "promtool check metrics".
func checkPromtool(tb testing.TB, text string) {
	tb.Helper()
	promtool, err := exec.LookPath("promtool")
	if err != nil {
		promtool = "/usr/bin/promtool"
		if _, err := os.Stat(promtool); err != nil {
			if os.Getenv("CI") == "true" {
				tb.Fatalf("promtool not found; CI must check the scrape")
			}
			tb.Log("promtool not found: the scrape is not linted")
			return
		}
	}
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = strings.NewReader(text)
	out, err := cmd.CombinedOutput()
	if err != nil || len(bytes.TrimSpace(out)) > 0 {
		tb.Errorf("promtool check metrics: %v\n%s", err, out)
	}
}

// checkWindowsAPI compares GET /v1/models/{model}/windows with the fixture.
func checkWindowsAPI(tb testing.TB, base string, fx e2eFixture) {
	tb.Helper()
	var got struct {
		Model     string    `json:"model"`
		Watermark time.Time `json:"watermark"`
		Windows   []struct {
			apiFigures
			Name string    `json:"name"`
			From time.Time `json:"from"`
			To   time.Time `json:"to"`
		} `json:"windows"`
	}
	getJSON(tb, base+"/v1/models/"+url.PathEscape(fx.Model)+"/windows", http.StatusOK, &got)
	if !got.Watermark.Equal(fx.Watermark) {
		tb.Errorf("GET windows: watermark %v, want %v", got.Watermark, fx.Watermark)
	}
	var names []string
	for _, w := range got.Windows {
		names = append(names, w.Name)
		want, ok := fx.Windows[w.Name]
		if !ok {
			continue
		}
		if !w.From.Equal(want.From) || !w.To.Equal(want.To) {
			tb.Errorf("GET windows %s: [%v, %v), want [%v, %v)", w.Name, w.From, w.To, want.From, want.To)
		}
		if !slices.Equal(w.Classes, fx.Classes) {
			tb.Errorf("GET windows %s: classes %v, want %v", w.Name, w.Classes, fx.Classes)
		}
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(tb, "GET windows "+w.Name, fx.Classes, w.figures(), want.figures)
	}
	if slices.Sort(names); !slices.Equal(names, sortedKeys(fx.Windows)) {
		tb.Errorf("GET windows: windows %v, want %v", names, sortedKeys(fx.Windows))
	}
}

func getMatrix(tb testing.TB, base, modelName string, from, to time.Time, segment *string, asOf *time.Time) matrixReport {
	tb.Helper()
	q := url.Values{"from": {from.Format(time.RFC3339)}, "to": {to.Format(time.RFC3339)}}
	if segment != nil {
		q.Set("segment", *segment)
	}
	if asOf != nil {
		q.Set("as_of", asOf.Format(time.RFC3339))
	}
	var rep matrixReport
	getJSON(tb, base+"/v1/models/"+url.PathEscape(modelName)+"/matrix?"+q.Encode(), http.StatusOK, &rep)
	return rep
}

// checkMisaligned expects 400 for a period that does not start on a
// bucket boundary, with a message saying so.
func checkMisaligned(tb testing.TB, base string, fx e2eFixture) {
	tb.Helper()
	p := fx.Periods[0]
	q := url.Values{
		"from": {p.From.Add(2 * time.Minute).Format(time.RFC3339)},
		"to":   {p.To.Format(time.RFC3339)},
	}
	var got struct {
		Error string `json:"error"`
	}
	getJSON(tb, base+"/v1/models/"+url.PathEscape(fx.Model)+"/matrix?"+q.Encode(), http.StatusBadRequest, &got)
	if !strings.Contains(got.Error, "aligned") {
		tb.Errorf("GET matrix with a misaligned from: error %q, want it to say the period is not aligned", got.Error)
	}
}

func getJSON(tb testing.TB, target string, wantStatus int, v any) {
	tb.Helper()
	resp, err := http.Get(target)
	if err != nil {
		tb.Fatalf("GET %s: %v", target, err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatalf("GET %s: read body: %v", target, err)
	}
	if resp.StatusCode != wantStatus {
		tb.Fatalf("GET %s: status %d, want %d\n%s", target, resp.StatusCode, wantStatus, body)
	}
	if err := json.Unmarshal(body, v); err != nil {
		tb.Fatalf("GET %s: decode: %v\n%s", target, err, body)
	}
}

// checkReport checks a period report's echo of its query and its classes.
func checkReport(tb testing.TB, where string, got matrixReport, fx e2eFixture, from, to time.Time, segment *string, asOf *time.Time) {
	tb.Helper()
	if got.Model != fx.Model || !got.From.Equal(from) || !got.To.Equal(to) {
		tb.Errorf("%s: model %q [%v, %v), want %q [%v, %v)", where, got.Model, got.From, got.To, fx.Model, from, to)
	}
	if (got.Segment == nil) != (segment == nil) || (segment != nil && *got.Segment != *segment) {
		tb.Errorf("%s: segment %v, want %v", where, deref(got.Segment), deref(segment))
	}
	if asOf != nil && !got.AsOf.Equal(*asOf) {
		tb.Errorf("%s: as_of %v, want %v", where, got.AsOf, *asOf)
	}
	if !slices.Equal(got.Classes, fx.Classes) {
		tb.Errorf("%s: classes %v, want %v", where, got.Classes, fx.Classes)
	}
}

// compareFigures compares every count and figure; a nil figure must be nil
// on both sides.
func compareFigures(tb testing.TB, where string, classes []string, got, want figures) {
	tb.Helper()
	if !slices.EqualFunc(got.Matrix, want.Matrix, slices.Equal) {
		tb.Errorf("%s: matrix %v, want %v", where, got.Matrix, want.Matrix)
	}
	if got.Predictions != want.Predictions || got.Labeled != want.Labeled {
		tb.Errorf("%s: predictions %d, labeled %d; want %d, %d", where, got.Predictions, got.Labeled, want.Predictions, want.Labeled)
	}
	for _, f := range []struct {
		name      string
		got, want *float64
	}{
		{"accuracy", got.Accuracy, want.Accuracy},
		{"balanced_accuracy", got.BalancedAccuracy, want.BalancedAccuracy},
		{"macro_f1", got.MacroF1, want.MacroF1},
		{"label_coverage", got.LabelCoverage, want.LabelCoverage},
		{"mcc", got.MCC, want.MCC},
		{"kappa", got.Kappa, want.Kappa},
	} {
		compareValue(tb, where+": "+f.name, f.got, f.want)
	}
	if len(got.PerClass) != len(classes) {
		tb.Errorf("%s: per_class has %d classes, want %d", where, len(got.PerClass), len(classes))
	}
	for _, class := range classes {
		g, w := got.PerClass[class], want.PerClass[class]
		at := where + ": " + class + " "
		if g.Support != w.Support || g.Predictions != w.Predictions {
			tb.Errorf("%ssupport %d, predictions %d; want %d, %d", at, g.Support, g.Predictions, w.Support, w.Predictions)
		}
		for _, f := range []struct {
			name      string
			got, want *float64
		}{
			{"recall", g.Recall, w.Recall},
			{"precision", g.Precision, w.Precision},
			{"specificity", g.Specificity, w.Specificity},
			{"f1", g.F1, w.F1},
			{"prevalence", g.Prevalence, w.Prevalence},
			{"predicted_share", g.PredictedShare, w.PredictedShare},
			{"recall_interval lower", bound(g.RecallInterval, 0), bound(w.RecallInterval, 0)},
			{"recall_interval upper", bound(g.RecallInterval, 1), bound(w.RecallInterval, 1)},
			{"precision_interval lower", bound(g.PrecisionInterval, 0), bound(w.PrecisionInterval, 0)},
			{"precision_interval upper", bound(g.PrecisionInterval, 1), bound(w.PrecisionInterval, 1)},
			{"specificity_interval lower", bound(g.SpecificityInterval, 0), bound(w.SpecificityInterval, 0)},
			{"specificity_interval upper", bound(g.SpecificityInterval, 1), bound(w.SpecificityInterval, 1)},
		} {
			compareValue(tb, at+f.name, f.got, f.want)
		}
	}
}

func compareValue(tb testing.TB, what string, got, want *float64) {
	tb.Helper()
	switch {
	case got == nil && want == nil:
	case got == nil || want == nil:
		tb.Errorf("%s = %v, want %v", what, deref(got), deref(want))
	case !nearlyEqual(*got, *want):
		tb.Errorf("%s = %v, want %v", what, *got, *want)
	}
}

// nearlyEqual reports whether got is within relTol of want. Exact zeros
// match only zeros.
func nearlyEqual(got, want float64) bool {
	return math.Abs(got-want) <= relTol*math.Max(math.Abs(got), math.Abs(want))
}

// deref prints an optional value: its value, or "null".
func deref[T any](p *T) any {
	if p == nil {
		return "null"
	}
	return *p
}

func periodName(from, to time.Time, segment *string, asOf *time.Time) string {
	s := fmt.Sprintf("[%s, %s)", from.Format(time.RFC3339), to.Format(time.RFC3339))
	if segment != nil {
		s += " segment=" + *segment
	}
	if asOf != nil {
		s += " as_of=" + asOf.Format(time.RFC3339)
	}
	return s
}

func sortedKeys[V any](m map[string]V) []string {
	return slices.Sorted(maps.Keys(m))
}
