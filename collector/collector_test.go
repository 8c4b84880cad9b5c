package collector_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

const (
	ndjson   = "application/x-ndjson"
	jsonType = "application/json"
)

// receiveTime is the fixed clock of the tests' collectors.
func receiveTime() time.Time { return time.Date(2026, 3, 1, 12, 30, 0, 0, time.UTC) }

func TestMain(m *testing.M) { pgtest.Main(m) }

// backend opens a fresh, migrated store of one kind for a test; reopen
// opens the same database again.
type backend struct {
	name string
	open func(tb testing.TB) (st store.Store, reopen func(testing.TB) store.Store)
}

func sqliteBackend() backend {
	return backend{"sqlite", func(tb testing.TB) (store.Store, func(testing.TB) store.Store) {
		path := filepath.Join(tb.TempDir(), "classwatch.db")
		return sqlitestoretest.OpenAt(tb, path, sqlitestore.Options{}), func(tb testing.TB) store.Store { return sqlitestoretest.OpenAt(tb, path, sqlitestore.Options{}) }
	}}
}

func postgresBackend() backend {
	return backend{"postgres", func(tb testing.TB) (store.Store, func(testing.TB) store.Store) {
		url := pgtest.URL(tb)
		return pgstoretest.Open(tb, url), func(tb testing.TB) store.Store { return pgstoretest.Open(tb, url) }
	}}
}

// eachStore runs test against the embedded SQLite file and against
// PostgreSQL (skipped without a server, see pgtest).
func eachStore(t *testing.T, test func(t *testing.T, be backend)) {
	for _, be := range []backend{sqliteBackend(), postgresBackend()} {
		t.Run(be.name, func(t *testing.T) { test(t, be) })
	}
}

// bundle is one test's collector on a fresh store behind a real HTTP
// server.
type bundle struct {
	store  store.Store
	reopen func(testing.TB) store.Store
	reg    *prometheus.Registry
	col    *collector.Collector
	srv    *httptest.Server

	mu        sync.Mutex
	commits   []commit
	registers map[string][]string
}

type commit struct {
	changes store.Changes
}

// recordingStore passes every call to the real store and records what the
// rolling windows would get from it: the committed changes that moved
// counts, and each class list.
type recordingStore struct {
	store.Store
	b *bundle
}

func (r recordingStore) record(ch store.Changes) {
	if len(ch.Cells)+len(ch.Predicted) == 0 {
		return
	}
	r.b.mu.Lock()
	defer r.b.mu.Unlock()
	r.b.commits = append(r.b.commits, commit{ch})
}

func (r recordingStore) EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error) {
	list, err := r.Store.EnsureModel(ctx, model, classes, maxClasses)
	if err == nil {
		r.b.mu.Lock()
		defer r.b.mu.Unlock()
		r.b.registers[model] = list
	}
	return list, err
}

func (r recordingStore) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	out, err := r.Store.IngestPredictions(ctx, batch, now)
	if err == nil {
		r.record(out.Changes)
	}
	return out, err
}

func (r recordingStore) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	out, err := r.Store.IngestLabels(ctx, batch, now)
	if err == nil {
		r.record(out.Changes)
	}
	return out, err
}

func (r recordingStore) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	n, ch, err := r.Store.ApplyLabelTimeout(ctx, model, label, timeout, now)
	if err == nil {
		r.record(ch)
	}
	return n, ch, err
}

// pausingStore calls pause after each prediction batch committed, before
// the collector goes on.
type pausingStore struct {
	collector.Store
	pause func()
}

func (p pausingStore) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	out, err := p.Store.IngestPredictions(ctx, batch, now)
	if err == nil {
		p.pause()
	}
	return out, err
}

// testModels are a fictional card-screening model with fixed classes and a
// fictional support-desk router that registers new classes up to five.
func testModels() []collector.ModelPolicy {
	return []collector.ModelPolicy{
		{Name: "card-fraud", Classes: []string{"legit", "fraud"}},
		{Name: "ticket-route", Classes: []string{"billing", "outage"}, AutoRegister: true, MaxClasses: 3},
	}
}

func setup(tb testing.TB, be backend, edit func(*collector.Options)) *bundle {
	tb.Helper()
	b := &bundle{reg: prometheus.NewRegistry(), registers: map[string][]string{}}
	b.store, b.reopen = be.open(tb)
	opts := collector.Options{
		Store:      recordingStore{Store: b.store, b: b},
		Models:     testModels(),
		Registerer: b.reg,
		Now:        receiveTime,
	}
	if edit != nil {
		edit(&opts)
	}
	var err error
	if b.col, err = collector.New(opts); err != nil {
		tb.Fatalf("new collector: %v", err)
	}
	if err := b.col.Prepare(context.Background()); err != nil {
		tb.Fatalf("prepare: %v", err)
	}
	mux := http.NewServeMux()
	b.col.Register(mux)
	mux.Handle("GET /metrics", promhttp.HandlerFor(b.reg, promhttp.HandlerOpts{}))
	b.srv = httptest.NewServer(mux)
	tb.Cleanup(b.srv.Close)
	return b
}

// reply is the response contract of the ingest endpoints; decoding refuses
// unknown fields so that the shape is pinned.
type reply struct {
	Accepted        int        `json:"accepted"`
	Duplicates      int        `json:"duplicates"`
	Rejected        []rejected `json:"rejected"`
	RejectedOmitted int        `json:"rejected_omitted"`
	Error           string     `json:"error"`
}

type rejected struct {
	Line  int    `json:"line"`
	Error string `json:"error"`
}

func (b *bundle) post(tb testing.TB, path, contentType, body string, header ...string) (int, reply, http.Header) {
	tb.Helper()
	req, err := http.NewRequest(http.MethodPost, b.srv.URL+path, strings.NewReader(body))
	if err != nil {
		tb.Fatal(err)
	}
	if contentType != "" {
		req.Header.Set("Content-Type", contentType)
	}
	for i := 0; i+1 < len(header); i += 2 {
		req.Header.Set(header[i], header[i+1])
	}
	return do(tb, req)
}

func do(tb testing.TB, req *http.Request) (int, reply, http.Header) {
	tb.Helper()
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		tb.Fatalf("post: %v", err)
	}
	defer resp.Body.Close()
	var r reply
	dec := json.NewDecoder(resp.Body)
	dec.DisallowUnknownFields()
	if err := dec.Decode(&r); err != nil {
		tb.Fatalf("decode %d response: %v", resp.StatusCode, err)
	}
	if r.Rejected == nil {
		tb.Errorf("response has no rejected array (status %d)", resp.StatusCode)
	}
	return resp.StatusCode, r, resp.Header
}

func (b *bundle) modelInfo(tb testing.TB, name string) store.ModelInfo {
	tb.Helper()
	infos, err := b.store.Models(context.Background())
	if err != nil {
		tb.Fatalf("models: %v", err)
	}
	for _, m := range infos {
		if m.Name == name {
			return m
		}
	}
	tb.Fatalf("model %s not in the store", name)
	return store.ModelInfo{}
}

// cells reads a model's matrix over all time as "actual/predicted" → n.
func (b *bundle) cells(tb testing.TB, model string) map[string]int64 {
	tb.Helper()
	c, err := b.store.Counts(context.Background(), store.Query{Model: model, From: time.Unix(0, 0), To: receiveTime().Add(24 * time.Hour)})
	if err != nil {
		tb.Fatalf("counts: %v", err)
	}
	out := map[string]int64{}
	for _, cell := range c.Cells {
		if cell.N != 0 {
			out[cell.Actual+"/"+cell.Predicted] += cell.N
		}
	}
	return out
}

func checkRejected(tb testing.TB, got []rejected, want []rejected) {
	tb.Helper()
	if len(got) != len(want) {
		tb.Errorf("rejected = %+v, want lines %+v", got, want)
		return
	}
	for i := range want {
		if got[i].Line != want[i].Line || !strings.Contains(got[i].Error, want[i].Error) {
			tb.Errorf("rejected[%d] = {%d %q}, want line %d with error containing %q", i, got[i].Line, got[i].Error, want[i].Line, want[i].Error)
		}
	}
}

func lines(ls ...string) string { return strings.Join(ls, "\n") + "\n" }

func TestPredictionsMixedLines(t *testing.T) { eachStore(t, testPredictionsMixedLines) }

func testPredictionsMixedLines(t *testing.T, be backend) {
	b := setup(t, be, nil)
	body := lines(
		`{"model":"card-fraud","id":"txn-1","at":"2026-03-01T12:00:00Z","predicted":"fraud","scores":{"fraud":0.91,"legit":0.09},"segment":"web"}`,
		``,
		`{"model":"card-fraud","id":"txn-2","at":"2026-03-01T12:07:00+01:00","predicted":"legit"}`,
		`{"model":"card-fraud","id":"txn-3","predicted":"legit"`,
		`{"model":"card-fraud","id":"txn-4","predicted":"legit","predicition":"fraud"}`,
		`{"model":"card-fraud","predicted":"legit"}`,
		`{"model":"card-fraud","id":"txn-5","at":"2026-03-01 12:00","predicted":"legit"}`,
		`{"model":"card-fraud","id":"txn-6","predicted":"legit","scores":{"legit":1.5}}`,
		`{"model":"card-fraud","id":"txn-7","predicted":"chargeback"}`,
		`{"model":"loan-default","id":"x-1","predicted":"yes"}`,
		`   `,
		`{"model":"card-fraud","id":"txn-1","at":"2026-03-01T12:00:00Z","predicted":"fraud","scores":{"fraud":0.91,"legit":0.09},"segment":"web"}`,
		`{"model":"card-fraud","id":"txn-2","at":"2026-03-01T11:07:00Z","predicted":"fraud"}`,
		`{"model":"card-fraud","id":7,"predicted":"legit"}`,
		`[1,2]`,
		`{"model":"card-fraud","id":"txn-8","predicted":"legit","scores":{"refund":0.2}}`,
		`{"model":"card-fraud","id":"txn-9","predicted":"legit","at":"2026-03-01T13:00:00Z"}`,
		`{"model":"card-fraud","id":"txn-10","predicted":"legit"} {"x":1}`,
	)
	code, r, _ := b.post(t, "/v1/predictions", ndjson, body)
	if code != http.StatusOK {
		t.Fatalf("status = %d, want 200 (%+v)", code, r)
	}
	// Line 2 and 11 are blank: skipped and not counted.
	if r.Accepted != 2 || r.Duplicates != 1 {
		t.Errorf("accepted, duplicates = %d, %d; want 2, 1", r.Accepted, r.Duplicates)
	}
	checkRejected(t, r.Rejected, []rejected{
		{4, "invalid JSON"},
		{5, `unknown field "predicition"`},
		{6, `"id" is required`},
		{7, `"at": "2026-03-01 12:00" is not an RFC 3339 time`},
		{8, `"scores": "legit" is 1.5, outside [0, 1]`},
		{9, `class "chargeback" is not registered for model "card-fraud"`},
		{10, `unknown model "loan-default"`},
		{13, "prediction txn-2 already recorded with different content; the first one stands"},
		{14, `"id" must be a string, not a number`},
		{15, "a line must be a JSON object, not an array"},
		{16, `class "refund" is not registered for model "card-fraud"`},
		{17, "more than 15m0s ahead of the receive time"},
		{18, "unexpected data after the JSON object"},
	})
	if got, want := r.Accepted+r.Duplicates+len(r.Rejected), 16; got != want {
		t.Errorf("accepted+duplicates+rejected = %d, want %d non-blank lines", got, want)
	}

	info := b.modelInfo(t, "card-fraud")
	if info.Predictions != 2 {
		t.Errorf("stored predictions = %d, want 2", info.Predictions)
	}
	// txn-2 at 12:07+01:00 is 11:07Z: the latest stored time is txn-1's.
	if want := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC); !info.LatestAt.Equal(want) {
		t.Errorf("latest at = %v, want %v", info.LatestAt, want)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_predictions_received_total", "card-fraud")); got != 3 {
		t.Errorf("predictions received = %v, want 3 (two stored, one duplicate)", got)
	}
	if got, want := testutil.ToFloat64(metric(t, b, "classwatch_last_prediction_timestamp_seconds", "card-fraud")), float64(time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC).Unix()); got != want {
		t.Errorf("last prediction timestamp = %v, want %v", got, want)
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	if len(b.commits) != 1 {
		t.Fatalf("commits that changed counts = %d, want 1", len(b.commits))
	}
	var predicted int64
	for _, d := range b.commits[0].changes.Predicted {
		predicted += d.N
	}
	if predicted != 2 {
		t.Errorf("committed predicted deltas sum to %d, want 2", predicted)
	}
}

// metric returns the collector behind one series for testutil.ToFloat64.
func metric(tb testing.TB, b *bundle, name string, labels ...string) prometheus.Collector {
	tb.Helper()
	return seriesCollector{b.reg, name, labels}
}

// seriesCollector exposes one gathered series of a registry as a collector.
type seriesCollector struct {
	reg    *prometheus.Registry
	name   string
	labels []string
}

func (s seriesCollector) Describe(chan<- *prometheus.Desc) {}

func (s seriesCollector) Collect(ch chan<- prometheus.Metric) {
	mfs, err := s.reg.Gather()
	if err != nil {
		return
	}
	for _, mf := range mfs {
		if mf.GetName() != s.name {
			continue
		}
		for _, m := range mf.GetMetric() {
			var vals []string
			for _, lp := range m.GetLabel() {
				vals = append(vals, lp.GetValue())
			}
			if !slices.Equal(vals, s.labels) {
				continue
			}
			desc := prometheus.NewDesc(s.name, "series", nil, nil)
			switch {
			case m.Counter != nil:
				ch <- prometheus.MustNewConstMetric(desc, prometheus.CounterValue, m.GetCounter().GetValue())
			case m.Gauge != nil:
				ch <- prometheus.MustNewConstMetric(desc, prometheus.GaugeValue, m.GetGauge().GetValue())
			}
		}
	}
}

func TestLabelsJoin(t *testing.T) { eachStore(t, testLabelsJoin) }

func testLabelsJoin(t *testing.T, be backend) {
	b := setup(t, be, nil)
	code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"card-fraud","id":"a","at":"2026-03-01T12:00:00Z","predicted":"fraud"}`,
		`{"model":"card-fraud","id":"b","at":"2026-03-01T12:01:00Z","predicted":"legit"}`,
		`{"model":"card-fraud","id":"c","at":"2026-03-01T12:02:00Z","predicted":"legit"}`,
	))
	if code != http.StatusOK || r.Accepted != 3 {
		t.Fatalf("predictions: %d %+v", code, r)
	}
	code, r, _ = b.post(t, "/v1/labels", ndjson, lines(
		`{"model":"card-fraud","id":"a","actual":"fraud","at":"2026-03-01T12:10:00Z"}`, // matched
		`{"model":"card-fraud","id":"b","actual":"fraud","at":"2026-03-01T12:10:00Z"}`, // matched
		`{"model":"card-fraud","id":"a","actual":"fraud","at":"2026-03-01T12:10:00Z"}`, // duplicate
		`{"model":"card-fraud","id":"b","actual":"legit","at":"2026-03-01T12:20:00Z"}`, // corrected
		`{"model":"card-fraud","id":"z","actual":"fraud","at":"2026-03-01T12:20:00Z"}`, // early
		`{"model":"card-fraud","id":"c","actual":"refund"}`,                            // unknown class
		`{"model":"card-fraud","id":"c","actual":"legit","predicted":"legit"}`,         // unknown field
		`{"model":"parcel-inspect","id":"p-1","actual":"dented"}`,                      // unknown model
	))
	if code != http.StatusOK {
		t.Fatalf("labels status = %d (%+v)", code, r)
	}
	if r.Accepted != 4 || r.Duplicates != 1 {
		t.Errorf("accepted, duplicates = %d, %d; want 4, 1", r.Accepted, r.Duplicates)
	}
	checkRejected(t, r.Rejected, []rejected{
		{6, `class "refund" is not registered`},
		{7, `unknown field "predicted"`},
		{8, `unknown model "parcel-inspect"`},
	})
	// The early label joins when its prediction arrives.
	code, r, _ = b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"z","at":"2026-03-01T12:03:00Z","predicted":"legit"}`)
	if code != http.StatusOK || r.Accepted != 1 {
		t.Fatalf("late prediction: %d %+v", code, r)
	}
	got := b.cells(t, "card-fraud")
	want := map[string]int64{"fraud/fraud": 1, "legit/legit": 1, "fraud/legit": 1}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("cells = %v, want %v", got, want)
	}
	for result, want := range map[string]float64{"matched": 2, "duplicate": 1, "corrected": 1, "early": 1, "rejected": 2, "implied": 0} {
		if got := testutil.ToFloat64(metric(t, b, "classwatch_labels_received_total", "card-fraud", result)); got != want {
			t.Errorf("labels received{result=%s} = %v, want %v", result, got, want)
		}
	}
	// The unknown model's rejection is counted under model="".
	if got := testutil.ToFloat64(metric(t, b, "classwatch_labels_received_total", "", "rejected")); got != 1 {
		t.Errorf(`labels received{model="",result="rejected"} = %v, want 1`, got)
	}
}

func TestJSONBodies(t *testing.T) { eachStore(t, testJSONBodies) }

func testJSONBodies(t *testing.T, be backend) {
	b := setup(t, be, nil)
	code, r, _ := b.post(t, "/v1/predictions", jsonType, `{"model":"card-fraud","id":"one","predicted":"legit"}`)
	if code != http.StatusOK || r.Accepted != 1 || len(r.Rejected) != 0 {
		t.Errorf("single object: %d %+v", code, r)
	}
	code, r, _ = b.post(t, "/v1/predictions", jsonType+"; charset=utf-8", `[
		{"model":"card-fraud","id":"two","predicted":"legit"},
		{"model":"card-fraud","id":"three"},
		"text",
		{"model":"card-fraud","id":"one","predicted":"legit"}
	]`)
	if code != http.StatusOK || r.Accepted != 1 || r.Duplicates != 1 {
		t.Errorf("array: %d %+v", code, r)
	}
	// Array elements are numbered by index + 1, not by text line.
	checkRejected(t, r.Rejected, []rejected{{2, `"predicted" is required`}, {3, "a line must be a JSON object, not a string"}})

	for name, body := range map[string]string{
		"broken array":  `[{"model":"card-fraud","id":"four","predicted":"legit"}, {"model":`,
		"two objects":   `{"model":"card-fraud","id":"four","predicted":"legit"} {"model":"card-fraud","id":"five","predicted":"legit"}`,
		"not JSON":      `model=card-fraud`,
		"empty":         ` `,
		"empty array":   `[]`,
		"trailing data": `[{"model":"card-fraud","id":"four","predicted":"legit"}] x`,
	} {
		code, r, _ := b.post(t, "/v1/predictions", jsonType, body)
		if code != http.StatusBadRequest || r.Error == "" || r.Accepted != 0 {
			t.Errorf("%s: %d %+v, want 400 with an error", name, code, r)
		}
	}
	if got := b.modelInfo(t, "card-fraud").Predictions; got != 2 {
		t.Errorf("stored predictions = %d, want 2 (nothing of the refused bodies)", got)
	}
}

func TestNewRejectsBadOptions(t *testing.T) {
	st := sqlitestoretest.Open(t, sqlitestore.Options{})
	cases := map[string]collector.Options{
		"no store":               {Registerer: prometheus.NewRegistry()},
		"no registerer":          {Store: st},
		"bad model name":         {Store: st, Registerer: prometheus.NewRegistry(), Models: []collector.ModelPolicy{{Name: "a/b"}}},
		"default label no class": {Store: st, Registerer: prometheus.NewRegistry(), Models: []collector.ModelPolicy{{Name: "m", Classes: []string{"x"}, DefaultLabel: "y", LabelTimeout: time.Hour}}},
		"timeout without label":  {Store: st, Registerer: prometheus.NewRegistry(), Models: []collector.ModelPolicy{{Name: "m", Classes: []string{"x"}, LabelTimeout: time.Hour}}},
		"model twice":            {Store: st, Registerer: prometheus.NewRegistry(), Models: []collector.ModelPolicy{{Name: "m"}, {Name: "m"}}},
		"empty token":            {Store: st, Registerer: prometheus.NewRegistry(), Tokens: []collector.Token{{Name: "t"}}},
	}
	for name, opts := range cases {
		if _, err := collector.New(opts); err == nil {
			t.Errorf("%s: New succeeded", name)
		}
	}
	reg := prometheus.NewRegistry()
	if _, err := collector.New(collector.Options{Store: st, Registerer: reg}); err != nil {
		t.Fatal(err)
	}
	if _, err := collector.New(collector.Options{Store: st, Registerer: reg}); err == nil {
		t.Errorf("a second collector on the same registry registered its metrics")
	}
}

// TestPromtoolCheckMetrics runs promtool's linter over the collector's
// exposition after some traffic and a maintenance run.
func TestPromtoolCheckMetrics(t *testing.T) {
	promtool, err := exec.LookPath("promtool")
	if err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatalf("promtool not found: %v", err)
		}
		t.Skip("promtool not installed")
	}
	b := setup(t, sqliteBackend(), nil)
	b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"p","predicted":"legit"}`)
	b.post(t, "/v1/labels", ndjson, `{"model":"card-fraud","id":"p","actual":"legit"}`+"\n{}\n")
	if err := b.col.Maintain(context.Background(), receiveTime()); err != nil {
		t.Fatal(err)
	}
	resp, err := http.Get(b.srv.URL + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	scrape, err := io.ReadAll(resp.Body)
	resp.Body.Close()
	if err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{
		"classwatch_predictions_received_total", "classwatch_labels_received_total",
		"classwatch_collector_request_duration_seconds_bucket", "classwatch_collector_batch_lines_bucket",
		"classwatch_collector_in_flight_batches", "classwatch_last_prediction_timestamp_seconds",
		"classwatch_collector_rejected_lines_total", "classwatch_collector_maintenance_last_success_timestamp_seconds",
	} {
		if !bytes.Contains(scrape, []byte(name)) {
			t.Errorf("scrape lacks %s", name)
		}
	}
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = bytes.NewReader(scrape)
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Errorf("promtool check metrics: %v\n%s", err, out)
	}
}
