package natsjs_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/collector/natsjs"
	"github.com/classwatch/classwatch/collector/natsjs/natstest"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// receiveTime is the fixed clock of the tests' collector.
func receiveTime() time.Time { return time.Date(2026, 3, 10, 12, 0, 0, 0, time.UTC) }

const (
	predSubject  = "cw.predictions"
	labelSubject = "cw.labels"
)

// rig is one test's nats-server, collector on a fresh SQLite file, and
// a publishing connection.
type rig struct {
	srv   *natstest.Server
	store store.Store
	col   *collector.Collector
	reg   *prometheus.Registry
	nc    *nats.Conn
	js    jetstream.JetStream
}

func newRig(t *testing.T, maxBody int64) *rig {
	t.Helper()
	ctx := context.Background()
	r := &rig{srv: natstest.Start(t), reg: prometheus.NewRegistry()}
	r.store = sqlitestoretest.Open(t, sqlitestore.Options{})
	var err error
	r.col, err = collector.New(collector.Options{
		Store:      r.store,
		Models:     []collector.ModelPolicy{{Name: "card-screen", Classes: []string{"legit", "fraud"}}},
		Registerer: r.reg,
		Now:        receiveTime,
		Limits:     collector.Limits{MaxBodyBytes: maxBody},
	})
	if err != nil {
		t.Fatalf("new collector: %v", err)
	}
	if err := r.col.Prepare(ctx); err != nil {
		t.Fatalf("prepare: %v", err)
	}
	r.nc, err = nats.Connect(r.srv.URL)
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	t.Cleanup(r.nc.Close)
	r.js, err = jetstream.New(r.nc)
	if err != nil {
		t.Fatalf("jetstream: %v", err)
	}
	return r
}

// start runs a source over sub (the collector when nil) until the test ends.
func (r *rig) start(t *testing.T, sub natsjs.Submitter, maxBody int64) *natsjs.Source {
	t.Helper()
	if sub == nil {
		sub = r.col
	}
	m, err := natsjs.NewMetrics(r.reg)
	if err != nil {
		t.Fatalf("metrics: %v", err)
	}
	src, err := natsjs.New(natsjs.Options{
		Config: natsjs.Config{
			URL: r.srv.URL, Stream: "CW", PredictionsSubject: predSubject, LabelsSubject: labelSubject,
			Durable: "cw", NakDelay: 50 * time.Millisecond, LagEvery: 50 * time.Millisecond,
		},
		Submitter:    sub,
		MaxBodyBytes: maxBody,
		Metrics:      m,
	})
	if err != nil {
		t.Fatalf("new source: %v", err)
	}
	src.Start(context.Background())
	t.Cleanup(func() { _ = src.Stop(context.Background()) })
	waitFor(t, "source ready", func() bool { return src.Ready(context.Background()) == nil })
	return src
}

// publish sends one message and waits for the stream to store it.
func (r *rig) publish(t *testing.T, subject, body string) {
	t.Helper()
	if _, err := r.js.Publish(context.Background(), subject, []byte(body)); err != nil {
		t.Fatalf("publish %s: %v", subject, err)
	}
}

// drained waits until the consumer has delivered and acknowledged every
// message of the stream.
func (r *rig) drained(t *testing.T) {
	t.Helper()
	waitFor(t, "consumer drained", func() bool {
		cons, err := r.js.Consumer(context.Background(), "CW", "cw")
		if err != nil {
			return false
		}
		info, err := cons.Info(context.Background())
		return err == nil && info.NumPending == 0 && info.NumAckPending == 0
	})
}

// rejects subscribes to the .rejected subjects and returns what arrived.
func (r *rig) rejects(t *testing.T) func() map[string][]natsjs.Rejection {
	t.Helper()
	var mu sync.Mutex
	got := map[string][]natsjs.Rejection{}
	sub, err := r.nc.Subscribe("cw.*.rejected", func(m *nats.Msg) {
		mu.Lock()
		defer mu.Unlock()
		sc := bufio.NewScanner(bytes.NewReader(m.Data))
		for sc.Scan() {
			var rec natsjs.Rejection
			if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
				t.Errorf("rejection record %q: %v", sc.Text(), err)
			}
			got[m.Subject] = append(got[m.Subject], rec)
		}
		if m.Header.Get(natsjs.HeaderSource) != "nats" || m.Header.Get(natsjs.HeaderSequence) == "" {
			t.Errorf("rejection headers %v", m.Header)
		}
	})
	if err != nil {
		t.Fatalf("subscribe: %v", err)
	}
	t.Cleanup(func() { _ = sub.Unsubscribe() })
	if err := r.nc.Flush(); err != nil {
		t.Fatalf("flush: %v", err)
	}
	return func() map[string][]natsjs.Rejection {
		mu.Lock()
		defer mu.Unlock()
		return got
	}
}

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// cells returns the model's matrix over all of March 2026 as
// "actual/predicted" → count, and the predictions per predicted class.
func cells(t *testing.T, st store.Store) (map[string]int64, map[string]int64) {
	t.Helper()
	c, err := st.Counts(context.Background(), store.Query{
		Model: "card-screen",
		From:  time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC),
		To:    time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC),
	})
	if err != nil {
		t.Fatalf("counts: %v", err)
	}
	m, p := map[string]int64{}, map[string]int64{}
	for _, cell := range c.Cells {
		m[cell.Actual+"/"+cell.Predicted] += cell.N
	}
	for _, pc := range c.Predicted {
		p[pc.Predicted] += pc.N
	}
	return m, p
}

func metric(t *testing.T, reg *prometheus.Registry, name string, labels ...string) float64 {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatalf("gather: %v", err)
	}
	var sum float64
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			for i := 0; i+1 < len(labels); i += 2 {
				found := false
				for _, lp := range m.GetLabel() {
					if lp.GetName() == labels[i] && lp.GetValue() == labels[i+1] {
						found = true
					}
				}
				if !found {
					continue next
				}
			}
			sum += m.GetCounter().GetValue() + m.GetGauge().GetValue()
		}
	}
	return sum
}

func pred(id, at, predicted string) string {
	return fmt.Sprintf(`{"model":"card-screen","id":%q,"at":%q,"predicted":%q}`, id, at, predicted)
}

func label(id, at, actual string) string {
	return fmt.Sprintf(`{"model":"card-screen","id":%q,"at":%q,"actual":%q}`, id, at, actual)
}

// TestMessagesCommitOnceWithRejectedLines sends predictions and labels in
// the three body encodings, with an early label, a duplicate, a correction
// and bad lines, and checks the store's exact cells (README.md "Join
// semantics and windows"), the acknowledgements and the .rejected records.
func TestMessagesCommitOnceWithRejectedLines(t *testing.T) {
	r := newRig(t, 0)
	got := r.rejects(t)
	r.start(t, nil, 0)

	// An early label: its prediction arrives later.
	r.publish(t, labelSubject, label("p4", "2026-03-01T12:20:00Z", "fraud"))
	r.publish(t, predSubject, strings.Join([]string{
		pred("p1", "2026-03-01T12:00:00Z", "fraud"),
		pred("p2", "2026-03-01T12:01:00Z", "legit"),
		`{"model":"card-screen","id":"p9","predicted":"chargeback"}`,
		pred("p3", "2026-03-01T12:02:00Z", "legit"),
	}, "\n"))
	r.drained(t) // the early label is stored before p4 arrives
	r.publish(t, predSubject, "["+pred("p4", "2026-03-01T12:03:00Z", "fraud")+","+pred("p1", "2026-03-01T12:00:00Z", "fraud")+"]")
	r.publish(t, labelSubject, strings.Join([]string{
		label("p1", "2026-03-02T08:00:00Z", "fraud"),
		label("p2", "2026-03-02T08:00:00Z", "legit"),
		label("p2", "2026-03-02T08:00:00Z", "legit"), // duplicate
		label("p3", "2026-03-02T08:00:00Z", "legit"),
		"not json",
	}, "\n"))
	r.drained(t)
	// A correction: p3 was fraud after all.
	r.publish(t, labelSubject, label("p3", "2026-03-03T08:00:00Z", "fraud"))
	r.drained(t)

	m, p := cells(t, r.store)
	wantCells := map[string]int64{"fraud/fraud": 2, "legit/legit": 1, "fraud/legit": 1}
	for k, v := range wantCells {
		if m[k] != v {
			t.Errorf("cell %s = %d, want %d (all: %v)", k, m[k], v, m)
		}
	}
	if m["legit/fraud"] != 0 || p["fraud"] != 2 || p["legit"] != 2 {
		t.Errorf("cells %v, predicted %v; want 2 fraud and 2 legit predictions", m, p)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_acked_total"); n != 5 {
		t.Errorf("acked %v messages, want 5", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_redelivered_total"); n != 0 {
		t.Errorf("redelivered %v, want 0", n)
	}
	if n := metric(t, r.reg, "classwatch_labels_received_total", "result", "duplicate"); n != 1 {
		t.Errorf("duplicate labels counted %v, want 1", n)
	}

	waitFor(t, "rejection records", func() bool {
		g := got()
		return len(g["cw.predictions.rejected"]) == 1 && len(g["cw.labels.rejected"]) == 1
	})
	pr := got()["cw.predictions.rejected"][0]
	if pr.Line != 3 || !strings.Contains(pr.Error, `"chargeback"`) || !strings.Contains(pr.Original, `"id":"p9"`) {
		t.Errorf("prediction rejection %+v, want line 3 naming the class with its original line", pr)
	}
	lr := got()["cw.labels.rejected"][0]
	if lr.Line != 5 || lr.Original != "not json" || lr.Error == "" {
		t.Errorf("label rejection %+v, want line 5 with its text", lr)
	}
}

// TestBadMessagesAreRefusedOnce checks that a message that can never be
// ingested is counted, published to .rejected and acknowledged: it never
// comes back.
func TestBadMessagesAreRefusedOnce(t *testing.T) {
	r := newRig(t, 2048)
	got := r.rejects(t)
	r.start(t, nil, 2048)

	r.publish(t, predSubject, `[{"model":"card-screen",`)                                            // a JSON array that does not parse
	r.publish(t, predSubject, pred("x1", "2026-03-01T12:00:00Z", "fraud")+strings.Repeat(" ", 3000)) // over the size limit
	r.publish(t, predSubject, `{"model":"fraud-watch","id":"x2","predicted":"fraud"}`)               // an unknown model
	r.publish(t, predSubject, pred("x3", "2026-03-01T12:00:00Z", "fraud"))                           // a good one after them
	r.drained(t)

	if n := metric(t, r.reg, "classwatch_jetstream_messages_refused_total", "reason", "unparseable"); n != 1 {
		t.Errorf("refused unparseable %v, want 1", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_refused_total", "reason", "too_large"); n != 1 {
		t.Errorf("refused too large %v, want 1", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_acked_total"); n != 4 {
		t.Errorf("acked %v, want 4", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_consumed_total"); n != 4 {
		t.Errorf("consumed %v, want 4: a refused message must not come back", n)
	}
	if _, p := cells(t, r.store); p["fraud"] != 1 {
		t.Errorf("predicted %v, want only x3 stored", p)
	}
	waitFor(t, "rejection records", func() bool { return len(got()["cw.predictions.rejected"]) == 3 })
	recs := got()["cw.predictions.rejected"]
	want := []struct {
		line int
		err  string
	}{{0, "cannot be parsed"}, {0, "2048-byte limit"}, {1, `unknown model "fraud-watch"`}}
	// Workers take messages in parallel, so the records come in any order.
	for _, w := range want {
		found := false
		for _, rec := range recs {
			found = found || rec.Line == w.line && strings.Contains(rec.Error, w.err)
		}
		if !found {
			t.Errorf("no rejection with line %d and %q in %+v", w.line, w.err, recs)
		}
	}
}

// failing fails its first calls with the given errors, then submits.
type failing struct {
	next natsjs.Submitter
	mu   sync.Mutex
	errs []error
}

func (f *failing) Submit(ctx context.Context, k collector.Kind, body io.Reader, opts collector.SubmitOptions) (collector.Result, error) {
	f.mu.Lock()
	var err error
	if len(f.errs) > 0 {
		err, f.errs = f.errs[0], f.errs[1:]
	}
	f.mu.Unlock()
	if err != nil {
		return collector.Result{}, err
	}
	return f.next.Submit(ctx, k, body, opts)
}

// TestUncommittedMessagesComeBack checks that a message the store could
// not commit, or that met backpressure, is handed back and committed once
// on redelivery.
func TestUncommittedMessagesComeBack(t *testing.T) {
	r := newRig(t, 0)
	sub := &failing{next: r.col, errs: []error{
		&collector.StoreError{FirstLine: 1, LastLine: 2, Err: store.ErrUnavailable},
		collector.ErrBusy,
	}}
	r.start(t, sub, 0)
	r.publish(t, predSubject, pred("q1", "2026-03-01T12:00:00Z", "fraud")+"\n"+pred("q2", "2026-03-01T12:00:00Z", "legit"))
	r.drained(t)

	if n := metric(t, r.reg, "classwatch_jetstream_naks_total", "reason", "store"); n != 1 {
		t.Errorf("store naks %v, want 1", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_naks_total", "reason", "busy"); n != 1 {
		t.Errorf("busy naks %v, want 1", n)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_redelivered_total"); n != 2 {
		t.Errorf("redelivered %v, want 2", n)
	}
	if n := metric(t, r.reg, "classwatch_predictions_received_total"); n != 2 {
		t.Errorf("predictions received %v, want 2 (counted once)", n)
	}
	if _, p := cells(t, r.store); p["fraud"] != 1 || p["legit"] != 1 {
		t.Errorf("predicted %v, want one of each", p)
	}
}

// blocking holds every submit until release is closed.
type blocking struct {
	next    natsjs.Submitter
	started chan struct{}
	release chan struct{}
	once    sync.Once
}

func (b *blocking) Submit(ctx context.Context, k collector.Kind, body io.Reader, opts collector.SubmitOptions) (collector.Result, error) {
	b.once.Do(func() { close(b.started) })
	<-b.release
	return b.next.Submit(ctx, k, body, opts)
}

// TestStopFinishesMessagesInHand stops a source while a message is being
// submitted: Stop waits for its commit and acknowledgement.
func TestStopFinishesMessagesInHand(t *testing.T) {
	r := newRig(t, 0)
	sub := &blocking{next: r.col, started: make(chan struct{}), release: make(chan struct{})}
	src := r.start(t, sub, 0)
	r.publish(t, predSubject, pred("s1", "2026-03-01T12:00:00Z", "fraud"))
	<-sub.started

	stopped := make(chan error, 1)
	go func() { stopped <- src.Stop(context.Background()) }()
	select {
	case err := <-stopped:
		t.Fatalf("Stop returned (%v) before the message in hand committed", err)
	case <-time.After(300 * time.Millisecond):
	}
	close(sub.release)
	if err := <-stopped; err != nil {
		t.Fatalf("stop: %v", err)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_acked_total"); n != 1 {
		t.Errorf("acked %v, want 1", n)
	}
	r.drained(t)
	if src.Ready(context.Background()) == nil {
		t.Error("a stopped source reports ready")
	}
}

// TestSourceNotReadyWithoutServer checks that a source whose server is
// down is not ready, and becomes ready when the server comes back.
func TestSourceNotReadyWithoutServer(t *testing.T) {
	r := newRig(t, 0)
	src := r.start(t, nil, 0)
	r.srv.Stop()
	waitFor(t, "not ready", func() bool { return src.Ready(context.Background()) != nil })
	if err := src.Ready(context.Background()); strings.Contains(err.Error(), "127.0.0.1") {
		t.Errorf("readiness error %q names the host", err)
	}
	r.srv.Restart()
	waitFor(t, "ready again", func() bool { return src.Ready(context.Background()) == nil })
	r.publish(t, predSubject, pred("n1", "2026-03-01T12:00:00Z", "fraud"))
	r.drained(t)
	if n := metric(t, r.reg, "classwatch_jetstream_source_up"); n != 1 {
		t.Errorf("source_up %v, want 1", n)
	}
}

// TestBadFirstLineDoesNotSinkTheRest sends NDJSON whose first line is a
// cut-off object — which, without a Content-Type header, looks like the
// start of one JSON object spread over lines — and NDJSON declared by its
// header: the good lines are stored and the bad one rejected alone.
func TestBadFirstLineDoesNotSinkTheRest(t *testing.T) {
	r := newRig(t, 0)
	got := r.rejects(t)
	r.start(t, nil, 0)
	r.publish(t, predSubject, `{"model":"card-screen","id":"c1",`+"\n"+pred("c2", "2026-03-01T12:00:00Z", "fraud"))
	m := nats.NewMsg(predSubject)
	m.Header.Set("Content-Type", "application/x-ndjson")
	m.Data = []byte(pred("c3", "2026-03-01T12:00:00Z", "legit") + "\n" + `{"model":`)
	if _, err := r.js.PublishMsg(context.Background(), m); err != nil {
		t.Fatal(err)
	}
	r.drained(t)
	if _, p := cells(t, r.store); p["fraud"] != 1 || p["legit"] != 1 {
		t.Errorf("predicted %v, want c2 and c3 stored", p)
	}
	waitFor(t, "rejection records", func() bool { return len(got()["cw.predictions.rejected"]) == 2 })
	lines := map[int]string{}
	for _, rec := range got()["cw.predictions.rejected"] {
		lines[rec.Line] = rec.Original
	}
	if lines[1] != `{"model":"card-screen","id":"c1",` || lines[2] != `{"model":` {
		t.Errorf("rejected lines %v, want line 1 of the first message and line 2 of the second", lines)
	}
	if n := metric(t, r.reg, "classwatch_jetstream_messages_refused_total"); n != 0 {
		t.Errorf("%v messages refused, want none", n)
	}
}

// TestStreamThatCapturesRejectsIsRefused: rejected lines published back
// into the input stream would come round again, so a source refuses an
// existing stream whose subjects take the .rejected subjects, and says so.
func TestStreamThatCapturesRejectsIsRefused(t *testing.T) {
	r := newRig(t, 0)
	_, err := r.js.CreateStream(context.Background(), jetstream.StreamConfig{Name: "CW", Subjects: []string{"cw.>"}})
	if err != nil {
		t.Fatal(err)
	}
	m, err := natsjs.NewMetrics(r.reg)
	if err != nil {
		t.Fatal(err)
	}
	src, err := natsjs.New(natsjs.Options{
		Config:    natsjs.Config{URL: r.srv.URL, Stream: "CW", PredictionsSubject: predSubject, LabelsSubject: labelSubject, Durable: "cw"},
		Submitter: r.col,
		Metrics:   m,
	})
	if err != nil {
		t.Fatal(err)
	}
	src.Start(context.Background())
	t.Cleanup(func() { _ = src.Stop(context.Background()) })
	waitFor(t, "the setup error", func() bool {
		err := src.Ready(context.Background())
		return err != nil && strings.Contains(err.Error(), "cw.predictions.rejected")
	})
	if _, err := r.js.Consumer(context.Background(), "CW", "cw"); err == nil {
		t.Error("the source created its consumer on a stream it refused")
	}
}
