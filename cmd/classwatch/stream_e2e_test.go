package main

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/classwatch/classwatch/collector/natsjs/natstest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// The stream tests run the real binary against a private nats-server
// (natstest) and PostgreSQL (pgtest), publish the fixture of testdata/e2e
// to JetStream, and check the figures gen.py computed independently, as
// the HTTP end-to-end test does (README.md "Stream source (NATS
// JetStream)").

// fixtureSteps are the fixture's bodies in the order the HTTP test posts
// them: early labels, predictions, labels.
var fixtureSteps = []struct{ subject, path, file string }{
	{testLabSubj, "/v1/labels", "labels_early.ndjson"},
	{testPredSubj, "/v1/predictions", "predictions.ndjson"},
	{testLabSubj, "/v1/labels", "labels.ndjson"},
}

// TestStreamSameAsHTTP sends the same bodies over HTTP to one daemon and
// as JetStream messages to another, and expects identical windows,
// matrices and counters, and the HTTP answer's rejected lines on the
// .rejected subjects.
func TestStreamSameAsHTTP(t *testing.T) {
	fx, srv, bin := streamSetup(t)
	cfgHTTP := writeE2EConfig(t, fx, pgtest.URL(t))
	cfgStream := writeE2EConfig(t, fx, pgtest.URL(t))
	addSource(t, cfgStream, srv.URL, "")
	dHTTP, dStream := startDaemon(t, bin, cfgHTTP), startDaemon(t, bin, cfgStream)
	waitReady(t, dStream.url)
	sc := newStreamClient(t, srv.URL)
	rejects := sc.watchRejects(t)

	wantRejects := map[string][]string{}
	for _, step := range fixtureSteps {
		file := filepath.Join(e2eDir, step.file)
		ans := postNDJSON(t, dHTTP.url+step.path, file)
		for _, r := range ans.Rejected {
			wantRejects[step.subject+".rejected"] = append(wantRejects[step.subject+".rejected"], fmt.Sprintf("%d: %s", r.Line, r.Error))
		}
		body, err := os.ReadFile(file)
		if err != nil {
			t.Fatal(err)
		}
		sc.publish(t, step.subject, body)
		sc.waitDrained(t, time.Minute)
	}

	httpMetrics := comparable(parseExposition(t, scrape(t, dHTTP.url+"/metrics")))
	streamText := scrape(t, dStream.url+"/metrics")
	streamMetrics := comparable(parseExposition(t, streamText))
	compareExpositions(t, httpMetrics, streamMetrics)
	checkPromtool(t, streamText)
	if n := len(httpMetrics["classwatch_confusion"]); n == 0 {
		t.Fatal("the HTTP daemon exports no confusion series; nothing was compared")
	}

	var httpWindows, streamWindows any
	path := "/v1/models/" + url.PathEscape(fx.Model) + "/windows"
	getJSON(t, dHTTP.url+path, 200, &httpWindows)
	getJSON(t, dStream.url+path, 200, &streamWindows)
	if !reflect.DeepEqual(httpWindows, streamWindows) {
		t.Errorf("GET windows differ:\nhttp:   %v\nstream: %v", httpWindows, streamWindows)
	}
	for _, p := range fx.Periods {
		h := getMatrix(t, dHTTP.url, fx.Model, p.From, p.To, p.Segment, p.AsOf)
		s := getMatrix(t, dStream.url, fx.Model, p.From, p.To, p.Segment, p.AsOf)
		if p.AsOf == nil {
			h.AsOf = s.AsOf // "now" at each request
		}
		if !reflect.DeepEqual(h, s) {
			t.Errorf("GET matrix %s differs:\nhttp:   %+v\nstream: %+v", periodName(p.From, p.To, p.Segment, p.AsOf), h, s)
		}
	}
	// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
	checkWindowsAPI(t, dStream.url, fx)

	checkRejects(t, rejects, wantRejects)
	dStream.stop(t)
	dHTTP.stop(t)
}

// checkRejects waits for the records of the .rejected subjects to match
// the HTTP answers' rejected lines, and expects each prediction record to
// carry its original line.
func checkRejects(t *testing.T, rejects *rejectWatch, wantRejects map[string][]string) {
	t.Helper()
	for subject, want := range wantRejects {
		var got []string
		deadline := time.Now().Add(10 * time.Second)
		for len(got) < len(want) && time.Now().Before(deadline) {
			got = got[:0]
			for _, r := range rejects.get(subject) {
				got = append(got, fmt.Sprintf("%d: %s", r.Line, r.Error))
			}
			time.Sleep(20 * time.Millisecond)
		}
		if !slices.Equal(got, want) {
			t.Errorf("%s:\n got %q\nwant %q (the HTTP answers)", subject, got, want)
		}
	}
	for _, r := range rejects.get(testPredSubj + ".rejected") {
		if r.Original == "" {
			t.Errorf("rejection of line %d lacks its original line", r.Line)
		}
	}
}

// streamSetup skips the test under -short, runs it in parallel, and
// returns the fixture, a private nats-server and the binary.
func streamSetup(t *testing.T) (e2eFixture, *natstest.Server, string) {
	t.Helper()
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped with -short")
	}
	t.Parallel()
	return loadE2EFixture(t), natstest.Start(t), buildBinary(t)
}

// replicaConfig writes the fixture's config on database with a nats
// source of the given keys, the short queue wait a short ack_wait needs,
// and refresh: 1s, so that replicas see each other's commits.
func replicaConfig(t *testing.T, fx e2eFixture, database, natsURL, keys string) string {
	t.Helper()
	cfg := writeE2EConfig(t, fx, database)
	addSource(t, cfg, natsURL, keys)
	shortQueueWait(t, cfg)
	appendConfig(t, cfg, "refresh: 1s\n")
	return cfg
}

// compareExpositions reports every series that differs between two
// scrapes.
func compareExpositions(tb testing.TB, want, got exposition) {
	tb.Helper()
	diffs := 0
	for _, fam := range sortedKeys(want) {
		for _, key := range sortedKeys(want[fam]) {
			g, ok := got[fam][key]
			if w := want[fam][key]; !ok || g != w {
				if diffs++; diffs <= 20 {
					tb.Errorf("%s{%s}: stream %v (present %v), http %v", fam, key, g, ok, w)
				}
			}
		}
		for key := range got[fam] {
			if _, ok := want[fam][key]; !ok {
				if diffs++; diffs <= 20 {
					tb.Errorf("%s{%s}: only the stream daemon has it", fam, key)
				}
			}
		}
	}
	for fam := range got {
		if _, ok := want[fam]; !ok {
			tb.Errorf("family %s: only the stream daemon has it", fam)
		}
	}
}

// createTestStream creates the stream as a daemon would, so messages can
// be published before any replica runs.
func createTestStream(tb testing.TB, sc *streamClient) {
	tb.Helper()
	_, err := sc.js.CreateStream(context.Background(), jetstream.StreamConfig{
		Name: testStream, Subjects: []string{testPredSubj, testLabSubj},
		Retention: jetstream.WorkQueuePolicy, Storage: jetstream.FileStorage,
	})
	if err != nil {
		tb.Fatalf("create stream: %v", err)
	}
}

// publishFixture publishes the fixture in many small messages, the lines
// of one id together, and returns how many.
func publishFixture(tb testing.TB, sc *streamClient, groups int) int {
	tb.Helper()
	n := 0
	for _, step := range fixtureSteps {
		n += sc.publishGrouped(tb, step.subject, filepath.Join(e2eDir, step.file), groups)
	}
	return n
}

// checkFinalFigures waits for the windows to refresh from the store, then
// checks them, every period's matrix and "classwatch verify".
func checkFinalFigures(t *testing.T, bin, cfg, base string, fx e2eFixture) {
	t.Helper()
	time.Sleep(2500 * time.Millisecond) // refresh: 1s in the test configs
	// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
	checkWindowsAPI(t, base, fx)
	for _, p := range fx.Periods {
		got := getMatrix(t, base, fx.Model, p.From, p.To, p.Segment, p.AsOf)
		compareFigures(t, "GET matrix "+periodName(p.From, p.To, p.Segment, p.AsOf), fx.Classes, got.figures(), p.figures)
	}
	out := runCommand(t, bin, "verify", "--config", cfg)
	if want := "verify: every count matches the raw rows"; !strings.Contains(out, want) {
		t.Errorf("classwatch verify printed %q, want %q", out, want)
	}
}

// metricValue scrapes one series (summed over the label sets that
// contain the given fragment).
func metricValue(tb testing.TB, base, family, fragment string) float64 {
	tb.Helper()
	var sum float64
	for key, v := range parseExposition(tb, scrape(tb, base+"/metrics"))[family] {
		if strings.Contains(key, fragment) {
			sum += v
		}
	}
	return sum
}

// TestStreamReplicasSurviveKill runs two replicas on one durable consumer
// and one PostgreSQL, SIGKILLs one mid-stream, and expects the fixture's
// exact figures: the messages the killed replica held come back to the
// other one, and the store's idempotence counts them once.
func TestStreamReplicasSurviveKill(t *testing.T) {
	fx, srv, bin := streamSetup(t)
	cfg := replicaConfig(t, fx, pgtest.URL(t), srv.URL, "fetch_messages: 8; workers: 2; ack_wait: 2s; nak_delay: 100ms")
	sc := newStreamClient(t, srv.URL)
	createTestStream(t, sc)
	sent := publishFixture(t, sc, 150)

	a, b := startDaemon(t, bin, cfg), startDaemon(t, bin, cfg)
	deadline := time.Now().Add(time.Minute)
	for metricValue(t, a.url, "classwatch_jetstream_messages_acked_total", "") < 20 {
		if time.Now().After(deadline) {
			t.Fatal("replica A acknowledged fewer than 20 messages in a minute")
		}
		time.Sleep(5 * time.Millisecond)
	}
	if err := a.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-a.done
	pending, ackPending, _ := sc.consumerState(t)
	t.Logf("killed replica A with %d messages not delivered and %d unacknowledged, of %d", pending, ackPending, sent)
	sc.waitDrained(t, 2*time.Minute)

	if n := metricValue(t, b.url, "classwatch_jetstream_messages_redelivered_total", ""); n < 1 && ackPending > 0 {
		t.Errorf("replica B saw %v redeliveries, want the messages A held", n)
	}
	checkFinalFigures(t, bin, cfg, b.url, fx)
	b.stop(t)
}

// TestStreamSurvivesDatabaseOutage cuts the replica off its PostgreSQL
// for 10 s mid-stream: the messages it cannot commit are handed back and
// redelivered, and the figures end exact.
func TestStreamSurvivesDatabaseOutage(t *testing.T) {
	fx, srv, bin := streamSetup(t)
	dbURL, err := url.Parse(pgtest.URL(t))
	if err != nil {
		t.Fatal(err)
	}
	proxy := startProxy(t, dbURL.Host)
	dbURL.Host = proxy.addr()
	cfg := replicaConfig(t, fx, dbURL.String(), srv.URL, "fetch_messages: 8; workers: 2; ack_wait: 5s; nak_delay: 500ms")
	sc := newStreamClient(t, srv.URL)
	d := startDaemon(t, bin, cfg)
	waitReady(t, d.url)

	// The early labels go through while the database is up.
	sc.publishGrouped(t, fixtureSteps[0].subject, filepath.Join(e2eDir, fixtureSteps[0].file), 10)
	sc.waitDrained(t, time.Minute)
	proxy.cut()
	for _, step := range fixtureSteps[1:] {
		sc.publishGrouped(t, step.subject, filepath.Join(e2eDir, step.file), 40)
	}
	time.Sleep(10 * time.Second)
	naks := metricValue(t, d.url, "classwatch_jetstream_naks_total", `reason="store"`)
	if naks < 1 {
		t.Errorf("%v messages handed back during the outage, want some", naks)
	}
	proxy.mend()
	sc.waitDrained(t, 2*time.Minute)
	if n := metricValue(t, d.url, "classwatch_jetstream_messages_redelivered_total", ""); n < 1 {
		t.Errorf("%v redeliveries after the outage, want some", n)
	}
	checkFinalFigures(t, bin, cfg, d.url, fx)
	d.stop(t)
}

// TestStreamReadiness checks that /readyz answers 503 naming the source
// (and no host) while NATS cannot be reached, and 200 once it is back.
func TestStreamReadiness(t *testing.T) {
	fx, srv, bin := streamSetup(t)
	cfg := writeE2EConfig(t, fx, "")
	addSource(t, cfg, srv.URL, "")
	d := startDaemon(t, bin, cfg) // waits for /readyz 200
	srv.Stop()
	var body struct {
		Error string `json:"error"`
	}
	deadline := time.Now().Add(30 * time.Second)
	for body.Error == "" && time.Now().Before(deadline) {
		resp, err := http.Get(d.url + "/readyz")
		if err != nil {
			t.Fatal(err)
		}
		if resp.StatusCode == http.StatusServiceUnavailable {
			if err := json.NewDecoder(resp.Body).Decode(&body); err != nil {
				t.Fatal(err)
			}
		}
		resp.Body.Close()
		time.Sleep(50 * time.Millisecond)
	}
	if !strings.Contains(body.Error, "source nats") || strings.Contains(body.Error, "127.0.0.1") {
		t.Errorf("/readyz error %q while NATS is down, want it to name the source and no host", body.Error)
	}
	srv.Restart()
	waitReady(t, d.url)
	d.stop(t)
}

// TestStreamGracefulStop sends SIGTERM to a replica mid-stream: it exits
// cleanly, and a second replica finishes the stream with exact figures.
func TestStreamGracefulStop(t *testing.T) {
	fx, srv, bin := streamSetup(t)
	cfg := replicaConfig(t, fx, pgtest.URL(t), srv.URL, "fetch_messages: 8; workers: 2; ack_wait: 3s")
	sc := newStreamClient(t, srv.URL)
	createTestStream(t, sc)
	publishFixture(t, sc, 150)

	a := startDaemon(t, bin, cfg)
	for metricValue(t, a.url, "classwatch_jetstream_messages_acked_total", "") < 20 {
		time.Sleep(5 * time.Millisecond)
	}
	a.stop(t) // exit status 0 within 10 s
	_, ackPending, _ := sc.consumerState(t)
	t.Logf("after SIGTERM: %d messages delivered to the stopped replica and not acknowledged", ackPending)

	b := startDaemon(t, bin, cfg)
	sc.waitDrained(t, 2*time.Minute)
	checkFinalFigures(t, bin, cfg, b.url, fx)
	b.stop(t)
}
