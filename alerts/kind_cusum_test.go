package alerts

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// cusumDrop is when the demo-like history's fraud recall falls from 0.9
// to 0.5 (invented data: one fraud every ten minutes, labeled an hour
// later, and one legit payment every five).
var cusumDrop = t0.Add(-5 * 24 * time.Hour)

// writeFraudHistory stores [from, to) of that history.
func writeFraudHistory(tb testing.TB, st store.Store, from, to time.Time) {
	tb.Helper()
	ctx := context.Background()
	var preds []store.Prediction
	var labels []store.Label
	add := func(id string, at time.Time, actual, predicted string) {
		preds = append(preds, store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: windows.BucketStart(at, 5*time.Minute), Predicted: predicted})
		labels = append(labels, store.Label{Model: "card-fraud", ID: id, Actual: actual, At: at.Add(time.Hour)})
	}
	for i, at := 0, from; at.Before(to); i, at = i+1, at.Add(5*time.Minute) {
		add(fmt.Sprintf("legit-%d", at.Unix()), at, "legit", "legit")
		if i%2 == 1 {
			continue
		}
		missed := i%20 == 0 // recall 0.9
		if !at.Before(cusumDrop) {
			missed = i%4 == 0 // recall 0.5
		}
		predicted := "fraud"
		if missed {
			predicted = "legit"
		}
		add(fmt.Sprintf("fraud-%d", at.Unix()), at, "fraud", predicted)
	}
	if _, err := st.IngestPredictions(ctx, preds, to); err != nil {
		tb.Fatal(err)
	}
	if _, err := st.IngestLabels(ctx, labels, to); err != nil {
		tb.Fatal(err)
	}
}

func cusumRule() Rule {
	return Rule{Name: "fraud-recall-cusum", Kind: KindCUSUM, Model: "card-fraud", Classes: []string{"fraud"},
		Lag: 72 * time.Hour, Expected: 0.9, Shift: 0.2, FalseAlarmEvery: 90 * 24 * time.Hour}
}

// cusumManager builds a manager over b whose models' watermark is wm();
// it registers no metrics.
func cusumManager(tb testing.TB, b *bundle, wm func() time.Time, rules ...Rule) *Manager {
	tb.Helper()
	opts := b.options(rules...)
	opts.Registerer = nil
	opts.Watermark = func(string) (time.Time, bool) { return wm(), true }
	return b.manager(tb, opts)
}

// TestCUSUMRule runs a cusum rule over a stored history in which fraud
// recall falls from 0.9 to 0.5: it holds or clears while the matured
// buckets are in control, fires once enough of the drop has matured,
// gives the same figures after a restart, and shows its statistic and
// threshold in GET /v1/alerts.
func TestCUSUMRule(t *testing.T) {
	b := setup(t)
	writeFraudHistory(t, b.st, t0.Add(-20*24*time.Hour), t0)
	wm := t0
	watermark := func() time.Time { return wm }
	key := instanceKey("fraud-recall-cusum", "card-fraud", "fraud", "")
	byRef := cusumRule()
	byRef.Name, byRef.Expected = "fraud-recall-cusum-ref", 0
	byRef.Reference = Reference{From: t0.Add(-20 * 24 * time.Hour), To: t0.Add(-13 * 24 * time.Hour)}
	m := cusumManager(t, b, watermark, cusumRule(), byRef)

	// Matured buckets end 72h before the watermark: before the drop
	// matured, nothing fires.
	wm = cusumDrop.Add(72 * time.Hour)
	res := findings(t, m)[key]
	if res.Outcome == OutcomeMet || res.Statistic == nil || res.Threshold == nil {
		t.Fatalf("in control: %+v; want no alarm, with statistic and threshold", res)
	}
	// ~6 frauds an hour for 7 days, against 90 days: the threshold is
	// designed for at least 6·24·90 trials between false alarms.
	if got := *res.TrialsPerHour; got < 5.9 || got > 6.1 {
		t.Errorf("trials per hour %g, want 6", got)
	}
	d, err := DesignCUSUM(0.9, 0.7, *res.TrialsPerHour*90*24)
	if err != nil || !near(*res.Threshold, d.Threshold(), 1e-12) {
		t.Errorf("threshold %g, designed %g (%v)", *res.Threshold, d.Threshold(), err)
	}

	// A day of the drop has matured: 72 frauds at recall 0.5 is far past
	// any threshold for p1 = 0.7.
	wm = cusumDrop.Add(96 * time.Hour)
	got := findings(t, m)
	for _, k := range []string{key, instanceKey("fraud-recall-cusum-ref", "card-fraud", "fraud", "")} {
		res := got[k]
		if res.Outcome != OutcomeMet || *res.Statistic < *res.Threshold || res.RunStart == nil || res.RunStart.Before(cusumDrop) {
			t.Fatalf("%s after the drop: %+v; want met, with the run starting at the drop", k, res)
		}
	}
	// The reference week holds buckets 0 … 2015 of the history: 1,008
	// frauds, of which those in buckets divisible by 20 (101) were missed.
	if ref := got[instanceKey("fraud-recall-cusum-ref", "card-fraud", "fraud", "")]; ref.Reference == nil || ref.Reference.Count != 1008 ||
		*ref.Reference.Value != 907.0/1008 || *ref.Expected != 907.0/1008 {
		t.Errorf("reference figures %+v, want p0 = 907/1008 from the stored range", ref.Reference)
	}
	evaluate(t, m, t0)
	if in := m.instanceOf(key); in == nil || in.State != StateFiring {
		t.Fatalf("state %+v, want firing", in)
	}
	// Recomputed from the stored cells: a restarted manager agrees.
	again := findings(t, cusumManager(t, b, watermark, cusumRule()))[key]
	if *again.Statistic != *got[key].Statistic || *again.Threshold != *got[key].Threshold {
		t.Errorf("after a restart: statistic %g threshold %g; before %g and %g", *again.Statistic, *again.Threshold, *got[key].Statistic, *got[key].Threshold)
	}

	rec := httptest.NewRecorder()
	m.handleAlerts(rec, httptest.NewRequest(http.MethodGet, "/v1/alerts", nil))
	var body struct{ Alerts []Alert }
	if err := json.Unmarshal(rec.Body.Bytes(), &body); err != nil {
		t.Fatal(err)
	}
	if len(body.Alerts) == 0 || !strings.Contains(rec.Body.String(), `"statistic":`) || !strings.Contains(rec.Body.String(), `"threshold":`) {
		t.Errorf("GET /v1/alerts = %s; want the cusum's statistic and threshold", rec.Body.String())
	}
	if s := body.Alerts[0].Annotations["summary"]; !strings.Contains(s, "cusum of recall of fraud on card-fraud") {
		t.Errorf("summary %q", s)
	}
}

// TestCUSUMResolvesAtZero: once the drop ends, the statistic falls back to
// 0 and only then does the alert resolve (between, it holds firing).
func TestCUSUMResolvesAtZero(t *testing.T) {
	b := setup(t)
	// Recall 0.5 for one day, then 0.9 again.
	writeFraudHistory(t, b.st, cusumDrop.Add(-24*time.Hour), cusumDrop.Add(24*time.Hour))
	recovered := cusumDrop.Add(24 * time.Hour)
	writeRecovered(t, b.st, recovered, recovered.Add(5*24*time.Hour))
	wm := cusumDrop.Add(96 * time.Hour)
	m := cusumManager(t, b, func() time.Time { return wm }, cusumRule())
	key := instanceKey("fraud-recall-cusum", "card-fraud", "fraud", "")
	var outcomes []Outcome
	for ; wm.Before(recovered.Add(5*24*time.Hour + 72*time.Hour)); wm = wm.Add(time.Hour) {
		b.now.set(wm)
		evaluate(t, m, wm)
		in := m.instanceOf(key)
		if in == nil {
			t.Fatalf("no instance at %s", wm)
		}
		if n := len(outcomes); n == 0 || outcomes[n-1] != in.Result.Outcome {
			outcomes = append(outcomes, in.Result.Outcome)
		}
		if in.State == StateResolved {
			if *in.Result.Statistic != 0 {
				t.Fatalf("resolved with statistic %g", *in.Result.Statistic)
			}
			if fmt.Sprint(outcomes) != "[met hold clear]" {
				t.Errorf("outcomes %v, want met, then hold, then clear", outcomes)
			}
			return
		}
	}
	t.Fatalf("never resolved; outcomes %v", outcomes)
}

// writeRecovered stores frauds at recall 0.9 in [from, to).
func writeRecovered(tb testing.TB, st store.Store, from, to time.Time) {
	tb.Helper()
	ctx := context.Background()
	var preds []store.Prediction
	var labels []store.Label
	for i, at := 0, from; at.Before(to); i, at = i+1, at.Add(10*time.Minute) {
		id := fmt.Sprintf("late-fraud-%d", at.Unix())
		predicted := "fraud"
		if i%10 == 0 {
			predicted = "legit"
		}
		preds = append(preds, store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: windows.BucketStart(at, 5*time.Minute), Predicted: predicted})
		labels = append(labels, store.Label{Model: "card-fraud", ID: id, Actual: "fraud", At: at.Add(time.Hour)})
	}
	if _, err := st.IngestPredictions(ctx, preds, to); err != nil {
		tb.Fatal(err)
	}
	if _, err := st.IngestLabels(ctx, labels, to); err != nil {
		tb.Fatal(err)
	}
}

// TestCUSUMReferenceWindow: p0 from a reference window leaves out the
// buckets the chart itself reads.
func TestCUSUMReferenceWindow(t *testing.T) {
	b := setup(t)
	ctx := context.Background()
	writeFraudHistory(t, b.st, t0.Add(-20*24*time.Hour), t0)
	tenDays := windows.Window{Name: "10d", Length: 240 * time.Hour}
	counts := func(from, to time.Time) [][]int64 {
		c, err := b.st.Counts(ctx, store.Query{Model: "card-fraud", From: from, To: to})
		if err != nil {
			t.Fatal(err)
		}
		m, _, err := windows.FromCounts(binary, c)
		if err != nil {
			t.Fatal(err)
		}
		return binaryRows(m.At(0, 0), m.At(0, 1), m.At(1, 0), m.At(1, 1))
	}
	// The window as the tracker would hold it at t0: [t0 − 10d, t0).
	b.views.set(t, "card-fraud", tenDays, binary, counts(t0.Add(-240*time.Hour), t0), nil)
	r := cusumRule()
	r.Expected, r.Reference = 0, Reference{Window: "10d"}
	opts := b.options(r)
	opts.Windows = append(opts.Windows, tenDays)
	opts.Watermark = func(string) (time.Time, bool) { return t0.Add(-24 * time.Hour), true }
	m := b.manager(t, opts)
	// The chart reads [t0 − 11d, t0 − 4d); the reference keeps
	// [t0 − 4d, t0) of its window.
	res := findings(t, m)[instanceKey(r.Name, "card-fraud", "fraud", "")]
	rest := counts(t0.Add(-96*time.Hour), t0)
	want := float64(rest[1][1]) / float64(rest[1][0]+rest[1][1])
	if res.Reference == nil || res.Reference.Count != rest[1][0]+rest[1][1] || *res.Reference.Value != want {
		t.Fatalf("reference %+v, want %d frauds at recall %g", res.Reference, rest[1][0]+rest[1][1], want)
	}
}

func TestParseCUSUM(t *testing.T) {
	rules, err := ParseRules(parseSection(t, `
alerts:
  - name: fraud-recall-cusum
    kind: cusum
    model: card-fraud
    classes: [fraud]
    lag: 72h
    reference: {window: 7d-matured}
    shift: 0.2
    false_alarm_every: 90d
  - name: prevalence-rise
    kind: cusum
    model: card-fraud
    metric: prevalence
    classes: [fraud]
    direction: up
    expected: 0.02
    shift: 0.02
    false_alarm_every: 30d
`, "alerts"))
	if err != nil {
		t.Fatal(err)
	}
	a, p := rules[0], rules[1]
	if a.Metric != "recall" || a.Direction != DirectionDown || a.Lag != 72*time.Hour || a.Reference.Window != "7d-matured" ||
		a.Shift != 0.2 || a.FalseAlarmEvery != 90*24*time.Hour || a.Severity != SeverityWarning {
		t.Errorf("first rule %+v", a)
	}
	if p.Metric != "prevalence" || p.Direction != DirectionUp || p.Expected != 0.02 || p.Lag != 0 {
		t.Errorf("second rule %+v", p)
	}
	for _, c := range []struct{ yaml, want string }{
		{"expected: 0.9\n    reference: {window: w}\n    shift: 0.2\n    false_alarm_every: 90d", `rule "r": expected: give either reference or expected`},
		{"shift: 0.2\n    false_alarm_every: 90d", `rule "r": expected: required unless reference is given`},
		{"expected: 0.9\n    false_alarm_every: 90d", `line 2: rule "r": shift: required`},
		{"expected: 0.9\n    shift: 0.2", `line 2: rule "r": false_alarm_every: required and positive`},
		{"expected: 0.1\n    shift: 0.2\n    false_alarm_every: 90d", `line 6: rule "r": shift: expected 0.1 shifted down by 0.2 leaves (0, 1)`},
		{"expected: 0.9\n    shift: 0.2\n    direction: sideways\n    false_alarm_every: 90d", `line 7: rule "r": direction: "sideways" is not one of down, up`},
		{"expected: 0.9\n    shift: 0.2\n    metric: f1\n    false_alarm_every: 90d", `line 7: rule "r": metric: "f1": a cusum rule watches recall, precision, specificity or prevalence`},
		{"expected: 1.5\n    shift: 0.2\n    false_alarm_every: 90d", `line 5: rule "r": expected: 1.5 must lie strictly between 0 and 1`},
		{"expected: 0.9\n    shift: 0.2\n    false_alarm_every: 90d\n    window: 1d", `line 8: rule "r": window: does not apply to kind cusum`},
	} {
		_, err := ParseRules(parseSection(t, "alerts:\n  - name: r\n    kind: cusum\n    model: m\n    "+c.yaml+"\n", "alerts"))
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%q: error %v, want %q", c.yaml, err, c.want)
		}
	}
}

// BenchmarkCUSUMEvaluate measures one evaluation of a cusum rule over a
// week of 5-minute buckets in SQLite (read, per-bucket trials, design of
// the threshold, run), against the store read of the same buckets alone:
//
//	go test -run '^$' -bench CUSUM -benchmem ./alerts/
func BenchmarkCUSUMEvaluate(b *testing.B) {
	bd := setup(b)
	writeFraudHistory(b, bd.st, t0.Add(-12*24*time.Hour), t0)
	wm := t0
	m := cusumManager(b, bd, func() time.Time { return wm })
	models, err := bd.st.Models(context.Background())
	if err != nil {
		b.Fatal(err)
	}
	c, err := CompileRules([]Rule{cusumRule()})
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	b.Run("store read only", func(b *testing.B) {
		for b.Loop() {
			if _, err := bd.st.Counts(ctx, store.Query{Model: "card-fraud", From: t0.Add(-72*time.Hour - cusumHorizon), To: t0.Add(-72 * time.Hour)}); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("evaluate", func(b *testing.B) {
		for b.Loop() {
			if _, _, err := c[0].Evaluate(ctx, m.env(t0, models)); err != nil {
				b.Fatal(err)
			}
		}
	})
}

func TestCUSUMReferenceInsideChart(t *testing.T) {
	r := cusumRule()
	r.Expected, r.Reference = 0, Reference{Window: "7d-matured"}
	err := CheckWindows([]Rule{r}, []windows.Window{weekWindow})
	if err == nil || !strings.Contains(err.Error(), `rule "fraud-recall-cusum": reference: window 7d-matured lies within the buckets the cusum reads itself`) {
		t.Errorf("a reference equal to the chart's own week: %v", err)
	}
	month := windows.Window{Name: "30d-matured", Length: 720 * time.Hour, Lag: 72 * time.Hour}
	r.Reference.Window = month.Name
	if err := CheckWindows([]Rule{r}, []windows.Window{weekWindow, month}); err != nil {
		t.Errorf("a matured month: %v", err)
	}
}
