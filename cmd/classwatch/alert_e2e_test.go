package main

import (
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"
)

// The alert end-to-end test runs the real binary against a real
// Alertmanager (the Debian package prometheus-alertmanager) on a loopback
// port. A fictional bank's card-screening model loses most of its fraud
// recall for an hour: the daemon must fire, Alertmanager must list the
// alert with our labels and notify its receiver once; a restart of the
// daemon in the middle must neither notify again nor lose the alert; a
// later good hour must resolve it everywhere.

// alertmanagerPath is where the Debian package installs Alertmanager.
const alertmanagerPath = "/usr/bin/prometheus-alertmanager"

// The alert rule of the test; the config below spells it out.
const (
	e2eRule     = "fraud-recall-floor"
	e2eModel    = "card-screen"
	e2eSeverity = "critical"
	e2eTeam     = "card-risk"
)

// amGroupInterval is the test Alertmanager's group_interval: a change to
// a group (a new or a resolved alert) is notified within about one.
const amGroupInterval = 500 * time.Millisecond

// wantAlertLabels are the labels Alertmanager must hold for the alert:
// the evaluator's own (alertname, model, class, severity) and the rule's.
var wantAlertLabels = map[string]string{
	"alertname": e2eRule, "model": e2eModel, "class": "fraud",
	"severity": e2eSeverity, "team": e2eTeam,
}

// amAlert is one alert of Alertmanager's GET /api/v2/alerts (the fields
// the test reads).
type amAlert struct {
	Labels      map[string]string `json:"labels"`
	StartsAt    time.Time         `json:"startsAt"`
	EndsAt      time.Time         `json:"endsAt"`
	UpdatedAt   time.Time         `json:"updatedAt"`
	Fingerprint string            `json:"fingerprint"`
	Status      struct {
		State string `json:"state"`
	} `json:"status"`
}

// amNotification is what Alertmanager posts to a webhook receiver (the
// fields the test reads).
type amNotification struct {
	Status string `json:"status"`
	Alerts []struct {
		Status      string            `json:"status"`
		Labels      map[string]string `json:"labels"`
		StartsAt    time.Time         `json:"startsAt"`
		EndsAt      time.Time         `json:"endsAt"`
		Fingerprint string            `json:"fingerprint"`
	} `json:"alerts"`
}

// cwAlert is one alert of classwatch's GET /v1/alerts and
// /v1/alerts/history (the fields the test reads).
type cwAlert struct {
	Key      string            `json:"key"`
	Rule     string            `json:"rule"`
	State    string            `json:"state"`
	Labels   map[string]string `json:"labels"`
	StartsAt time.Time         `json:"starts_at"`
	EndsAt   time.Time         `json:"ends_at"`
	Result   struct {
		Outcome  string      `json:"outcome"`
		Value    *float64    `json:"value"`
		Count    int64       `json:"count"`
		Interval *[2]float64 `json:"interval"`
	} `json:"result"`
	UpdatedAt time.Time `json:"updated_at"` // history only
}

func TestAlertsE2E(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the binary and Alertmanager; skipped with -short")
	}
	amBin := alertmanagerBinary(t)
	began := time.Now()
	phase := func(name string) { t.Logf("%6.1fs %s", time.Since(began).Seconds(), name) }

	bin := buildBinary(t)
	phase("built classwatch")
	receiver := newNotificationRecorder(t)
	am := startTestAlertmanager(t, amBin, receiver.url)
	phase("alertmanager ready")
	cfg := writeAlertsE2EConfig(t, am)

	// Event times lie in past hours, so the 1h window of the event clock
	// holds exactly the hour last sent; labels come five minutes after
	// their predictions.
	badHour := time.Now().UTC().Truncate(time.Hour).Add(-4 * time.Hour)
	goodHour := badHour.Add(2 * time.Hour)

	// 1. The drop: 30 of 100 frauds caught.
	d1 := startDaemon(t, bin, cfg)
	phase("daemon started")
	postHour(t, d1.url, "bad", badHour, 30)

	mine := waitAlertmanager(t, am, "Alertmanager to list the firing alert", func(as []amAlert) bool {
		return len(as) == 1 && as[0].Status.State == "active"
	})
	fired := mine[0]
	if !maps.Equal(fired.Labels, wantAlertLabels) {
		t.Errorf("Alertmanager holds labels %v, want %v", fired.Labels, wantAlertLabels)
	}
	if !fired.EndsAt.After(time.Now()) {
		t.Errorf("Alertmanager's endsAt %s is not in the future", fired.EndsAt)
	}
	first := receiver.wait(t, 1, "the firing notification")[0]
	checkNotification(t, first, "firing", fired)
	phase("fired; Alertmanager notified its receiver")

	got := currentAlert(t, d1.url)
	if got == nil || got.State != "firing" || !got.StartsAt.Equal(fired.StartsAt) || !maps.Equal(got.Labels, wantAlertLabels) {
		t.Fatalf("classwatch GET /v1/alerts: %+v, want %s firing since %s with labels %v", got, e2eRule, fired.StartsAt, wantAlertLabels)
	}
	if got.Result.Count != 100 || got.Result.Value == nil || !nearlyEqual(*got.Result.Value, 0.3) {
		t.Errorf("classwatch's fraud recall: %v of %d, want 0.3 of 100 (the frauds sent)", deref(got.Result.Value), got.Result.Count)
	}
	// source: statsmodels 0.13.5 proportion_confint(30, 100, alpha=0.05,
	// method='wilson'); its upper bound lies below the 0.6 floor.
	wantInterval := [2]float64{0.21894885294932756, 0.39584854633346667}
	if iv := got.Result.Interval; iv == nil || !nearlyEqual(iv[0], wantInterval[0]) || !nearlyEqual(iv[1], wantInterval[1]) {
		t.Errorf("classwatch's fraud recall interval: %v, want %v", deref(iv), wantInterval)
	}

	// 2. A restart in the middle. Without a resend from the new process,
	// Alertmanager would resolve the alert at the end time the old one set
	// (and notify its receiver); with a resend it must not notify at all,
	// since the alert is the one it already told of.
	before := waitAlertmanager(t, am, "the firing alert before the restart", func(as []amAlert) bool { return len(as) == 1 })[0]
	d1.stop(t)
	stoppedAt := time.Now()
	phase("daemon stopped (SIGTERM)")
	d2 := startDaemon(t, bin, cfg)
	phase("daemon restarted")
	waitAlertmanager(t, am, "the restarted daemon to resend the firing alert", func(as []amAlert) bool {
		return len(as) == 1 && as[0].UpdatedAt.After(stoppedAt)
	})
	quietUntil := before.EndsAt.Add(time.Second)
	if least := time.Now().Add(4 * amGroupInterval); quietUntil.Before(least) {
		quietUntil = least
	}
	time.Sleep(time.Until(quietUntil))
	if n := receiver.all(); len(n) != 1 {
		t.Errorf("Alertmanager notified %d times by the end of the quiet period after the restart, want once: %+v", len(n), n)
	}
	after := waitAlertmanager(t, am, "the one alert after the restart", func(as []amAlert) bool { return len(as) >= 1 })
	if len(after) != 1 || after[0].Fingerprint != fired.Fingerprint || !after[0].StartsAt.Equal(fired.StartsAt) ||
		after[0].Status.State != "active" || !after[0].EndsAt.After(before.EndsAt) {
		t.Errorf("after the restart Alertmanager holds %+v, want one active alert %s since %s ending after %s",
			after, fired.Fingerprint, fired.StartsAt, before.EndsAt)
	}
	got = currentAlert(t, d2.url)
	if got == nil || got.State != "firing" || !got.StartsAt.Equal(fired.StartsAt) {
		t.Fatalf("classwatch GET /v1/alerts after the restart: %+v, want %s firing since %s", got, e2eRule, fired.StartsAt)
	}
	phase("restart checked: one alert, no second notification")

	// 3. Recovery: a later hour with 95 of 100 frauds caught moves the 1h
	// window past the bad hour.
	postHour(t, d2.url, "good", goodHour, 95)
	waitCondition(t, "classwatch to resolve the alert", func() (bool, string) {
		a := currentAlert(t, d2.url)
		return a == nil || a.State == "resolved", fmt.Sprintf("%+v", a)
	})
	waitAlertmanager(t, am, "Alertmanager to see the alert resolved", func(as []amAlert) bool {
		return len(as) == 0 || (len(as) == 1 && as[0].Status.State != "active")
	})
	notes := receiver.wait(t, 2, "the resolved notification")
	checkNotification(t, notes[1], "resolved", fired)
	phase("resolved; Alertmanager notified its receiver")

	// Alertmanager would also resolve an alert nobody resends once its end
	// time passed; the end time it notified must be classwatch's own.
	resolved := checkAlertHistory(t, d2.url, fired.StartsAt)
	if end := notes[1].Alerts[0].EndsAt; !end.Equal(resolved.EndsAt) {
		t.Errorf("Alertmanager notified the alert resolved at %s, want classwatch's resolution time %s", end, resolved.EndsAt)
	}
	d2.stop(t)
	if n := receiver.all(); len(n) != 2 {
		t.Errorf("Alertmanager notified %d times in all, want twice (firing, resolved): %+v", len(n), n)
	}
	phase("done")
}

// alertmanagerBinary returns the installed Alertmanager, skipping the test
// without one unless CI=true, where that is a failure.
func alertmanagerBinary(tb testing.TB) string {
	tb.Helper()
	if p, err := exec.LookPath("prometheus-alertmanager"); err == nil {
		return p
	}
	if _, err := os.Stat(alertmanagerPath); err == nil {
		return alertmanagerPath
	}
	if os.Getenv("CI") == "true" {
		tb.Fatalf("%s is not installed (CI=true)", alertmanagerPath)
	}
	tb.Skipf("%s is not installed", alertmanagerPath)
	return ""
}

// startTestAlertmanager runs Alertmanager on a free loopback port, without
// clustering, routing every alert to receiver with short group timers, and
// returns its base URL once it is ready.
func startTestAlertmanager(tb testing.TB, bin, receiver string) string {
	tb.Helper()
	dir := tb.TempDir()
	cfg := filepath.Join(dir, "alertmanager.yml")
	if err := os.WriteFile(cfg, []byte(fmt.Sprintf(`route:
  receiver: classwatch-test
  group_by: [alertname, model]
  group_wait: 200ms
  group_interval: %s
  repeat_interval: 1h
receivers:
  - name: classwatch-test
    webhook_configs:
      - url: %q
        send_resolved: true
`, amGroupInterval, receiver)), 0o600); err != nil {
		tb.Fatal(err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		tb.Fatal(err)
	}
	addr := l.Addr().String()
	l.Close()
	out := &lockedBuffer{}
	cmd := exec.Command(bin, "--config.file="+cfg, "--storage.path="+filepath.Join(dir, "data"),
		"--web.listen-address="+addr, "--cluster.listen-address=", "--log.level=warn")
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		tb.Fatalf("start alertmanager: %v", err)
	}
	exited := make(chan struct{})
	go func() {
		_ = cmd.Wait()
		close(exited)
	}()
	tb.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-exited
		if tb.Failed() {
			tb.Logf("alertmanager output:\n%s", out)
		}
	})
	base := "http://" + addr
	deadline := time.Now().Add(20 * time.Second)
	for {
		if resp, err := http.Get(base + "/-/ready"); err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return base
			}
		}
		select {
		case <-exited:
			tb.Fatalf("alertmanager exited:\n%s", out)
		case <-time.After(50 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			tb.Fatalf("alertmanager not ready at %s after 20s:\n%s", base, out)
		}
	}
}

// writeAlertsE2EConfig writes the daemon's config: one model, a 1h window
// on the event clock, the SQLite store under a data_dir that outlives a
// restart, a floor rule on fraud recall evaluated every second, and the
// test Alertmanager as notifier, resending every 2s.
func writeAlertsE2EConfig(tb testing.TB, alertmanager string) string {
	tb.Helper()
	dir := tb.TempDir()
	cfg := fmt.Sprintf(`data_dir: %q
database: ""
bucket: 5m
confidence: 0.95
clock: event
windows:
  - {name: 1h, length: 1h}
models:
  - name: %s
    classes: [legit, fraud]
ingest: {max_future: 0}
alerts:
  - name: %s
    kind: floor
    model: %s
    window: 1h
    metric: recall
    classes: [fraud]
    threshold: 0.6
    min_count: 50
    schedule: "@every 1s"
    fire_after: 2
    resolve_after: 2
    severity: %s
    labels: {team: %s}
notifiers:
  - name: oncall
    type: alertmanager
    url: %q
    resend_interval: 2s
    retry_wait: 100ms
`, filepath.Join(dir, "data"), e2eModel, e2eRule, e2eModel, e2eSeverity, e2eTeam, alertmanager)
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(cfg), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}

// postHour sends one hour of traffic, 500 predictions spread evenly over
// it and a label for each: 100 frauds of which caught are predicted fraud,
// and 400 legitimate payments of which 10 are flagged.
func postHour(tb testing.TB, base, prefix string, hour time.Time, caught int) {
	tb.Helper()
	const frauds, legits, flagged = 100, 400, 10
	var preds, labels []string
	for i := range frauds + legits {
		at := hour.Add(time.Duration(i) * time.Hour / (frauds + legits))
		actual, predicted := "legit", "legit"
		switch {
		case i < frauds:
			actual = "fraud"
			if i < caught {
				predicted = "fraud"
			}
		case i < frauds+flagged:
			predicted = "fraud"
		}
		id := fmt.Sprintf("%s-%04d", prefix, i)
		preds = append(preds, fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"predicted":%q}`,
			e2eModel, id, at.Format(time.RFC3339), predicted))
		labels = append(labels, fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"actual":%q}`,
			e2eModel, id, at.Add(5*time.Minute).Format(time.RFC3339), actual))
	}
	postAll(tb, base+"/v1/predictions", preds)
	postAll(tb, base+"/v1/labels", labels)
}

// postAll posts NDJSON lines and expects every one accepted.
func postAll(tb testing.TB, target string, lines []string) {
	tb.Helper()
	got := postBody(tb, target, []byte(strings.Join(lines, "\n")+"\n"), http.StatusOK)
	if got.Accepted != len(lines) {
		tb.Fatalf("POST %s: %+v; want all %d lines accepted", target, got, len(lines))
	}
}

// currentAlert returns the test rule's alert of classwatch's GET
// /v1/alerts, or nil when it lists none.
func currentAlert(tb testing.TB, base string) *cwAlert {
	tb.Helper()
	var body struct {
		Alerts      []cwAlert         `json:"alerts"`
		Undelivered []json.RawMessage `json:"undelivered"`
	}
	getJSON(tb, base+"/v1/alerts", http.StatusOK, &body)
	if len(body.Undelivered) > 0 {
		tb.Errorf("GET /v1/alerts lists undelivered notifications: %s", body.Undelivered)
	}
	var mine []cwAlert
	for _, a := range body.Alerts {
		if a.Rule == e2eRule {
			mine = append(mine, a)
		}
	}
	switch len(mine) {
	case 0:
		return nil
	case 1:
		return &mine[0]
	}
	tb.Fatalf("GET /v1/alerts lists %d alerts of %s, want at most one: %+v", len(mine), e2eRule, mine)
	return nil
}

// checkAlertHistory expects, for the test rule, exactly one change to
// firing and one to resolved, both of the episode that started at
// startsAt, the resolution after the firing. It returns the resolved
// record.
func checkAlertHistory(tb testing.TB, base string, startsAt time.Time) cwAlert {
	tb.Helper()
	var body struct {
		History []cwAlert `json:"history"`
	}
	getJSON(tb, base+"/v1/alerts/history", http.StatusOK, &body)
	var firing, resolved []cwAlert
	for _, h := range body.History {
		if h.Rule != e2eRule {
			continue
		}
		switch h.State {
		case "firing":
			firing = append(firing, h)
		case "resolved":
			resolved = append(resolved, h)
		}
	}
	if len(firing) != 1 || len(resolved) != 1 {
		tb.Fatalf("GET /v1/alerts/history: %d firing and %d resolved records of %s, want one each\n%+v",
			len(firing), len(resolved), e2eRule, body.History)
	}
	f, r := firing[0], resolved[0]
	if !f.StartsAt.Equal(startsAt) || !r.StartsAt.Equal(startsAt) {
		tb.Errorf("history: firing since %s, resolved since %s; want both since %s", f.StartsAt, r.StartsAt, startsAt)
	}
	if !r.EndsAt.After(startsAt) || !r.UpdatedAt.After(f.UpdatedAt) {
		tb.Errorf("history: resolved at %s (recorded %s) after firing recorded %s; want it later", r.EndsAt, r.UpdatedAt, f.UpdatedAt)
	}
	if !maps.Equal(r.Labels, wantAlertLabels) {
		tb.Errorf("history: resolved record labels %v, want %v", r.Labels, wantAlertLabels)
	}
	return r
}

// checkNotification expects a webhook notification of status about the
// one alert Alertmanager listed as fired.
func checkNotification(tb testing.TB, n amNotification, status string, fired amAlert) {
	tb.Helper()
	if n.Status != status || len(n.Alerts) != 1 {
		tb.Fatalf("Alertmanager notified %+v, want %s with one alert", n, status)
	}
	a := n.Alerts[0]
	if a.Status != status || a.Fingerprint != fired.Fingerprint || !a.StartsAt.Equal(fired.StartsAt) || !maps.Equal(a.Labels, wantAlertLabels) {
		tb.Errorf("Alertmanager notified alert %+v, want %s %s since %s with labels %v",
			a, status, fired.Fingerprint, fired.StartsAt, wantAlertLabels)
	}
}

// waitAlertmanager lists Alertmanager's alerts of the test rule until ok
// accepts them.
func waitAlertmanager(tb testing.TB, base, what string, ok func([]amAlert) bool) []amAlert {
	tb.Helper()
	var mine []amAlert
	waitCondition(tb, what, func() (bool, string) {
		var all []amAlert
		getJSON(tb, base+"/api/v2/alerts", http.StatusOK, &all)
		mine = mine[:0]
		for _, a := range all {
			if a.Labels["alertname"] == e2eRule {
				mine = append(mine, a)
			}
		}
		return ok(mine), fmt.Sprintf("%+v", mine)
	})
	return mine
}

// waitTimeout bounds each wait of the test; every step needs a few
// evaluations (1s apart) and Alertmanager group intervals at most.
const waitTimeout = 15 * time.Second

// waitCondition polls cond until it holds, failing after waitTimeout with
// cond's description of what it last saw.
func waitCondition(tb testing.TB, what string, cond func() (bool, string)) {
	tb.Helper()
	deadline := time.Now().Add(waitTimeout)
	for {
		ok, seen := cond()
		if ok {
			return
		}
		if time.Now().After(deadline) {
			tb.Fatalf("waited %s for %s; last saw %s", waitTimeout, what, seen)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// notificationRecorder is a webhook receiver for Alertmanager that keeps
// every notification.
type notificationRecorder struct {
	url  string
	mu   sync.Mutex
	seen []amNotification
}

func newNotificationRecorder(tb testing.TB) *notificationRecorder {
	tb.Helper()
	r := &notificationRecorder{}
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
		body, err := io.ReadAll(req.Body)
		var n amNotification
		if err == nil {
			err = json.Unmarshal(body, &n)
		}
		if err != nil {
			tb.Errorf("alertmanager webhook %q: %v", body, err)
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		r.mu.Lock()
		r.seen = append(r.seen, n)
		r.mu.Unlock()
	}))
	tb.Cleanup(srv.Close)
	r.url = srv.URL
	return r
}

// all returns the notifications received so far.
func (r *notificationRecorder) all() []amNotification {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([]amNotification(nil), r.seen...)
}

// wait waits until n notifications arrived and returns them, failing if
// more arrived.
func (r *notificationRecorder) wait(tb testing.TB, n int, what string) []amNotification {
	tb.Helper()
	var got []amNotification
	waitCondition(tb, what, func() (bool, string) {
		got = r.all()
		return len(got) >= n, fmt.Sprintf("%d notifications: %+v", len(got), got)
	})
	if len(got) != n {
		tb.Fatalf("Alertmanager sent %d notifications, want %d: %+v", len(got), n, got)
	}
	return got
}
