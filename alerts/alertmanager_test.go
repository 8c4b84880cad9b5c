package alerts

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
)

// needBinary returns the path of the first of names on PATH (or at an
// absolute path), skipping the test when none is installed, unless CI=true,
// where a missing tool is a failure.
func needBinary(tb testing.TB, names ...string) string {
	tb.Helper()
	for _, n := range names {
		if p, err := exec.LookPath(n); err == nil {
			return p
		}
	}
	if os.Getenv("CI") == "true" {
		tb.Fatalf("none of %v installed (CI=true)", names)
	}
	tb.Skipf("none of %v installed", names)
	return ""
}

// amWebhook is what Alertmanager posts to its webhook receivers (the
// fields the test reads).
type amWebhook struct {
	Status string `json:"status"`
	Alerts []struct {
		Status   string            `json:"status"`
		Labels   map[string]string `json:"labels"`
		StartsAt time.Time         `json:"startsAt"`
	} `json:"alerts"`
}

// amAlert is one alert of Alertmanager's GET /api/v2/alerts.
type amAlert struct {
	Labels       map[string]string `json:"labels"`
	Annotations  map[string]string `json:"annotations"`
	StartsAt     time.Time         `json:"startsAt"`
	EndsAt       time.Time         `json:"endsAt"`
	GeneratorURL string            `json:"generatorURL"`
	Fingerprint  string            `json:"fingerprint"`
	Status       struct {
		State string `json:"state"`
	} `json:"status"`
}

// startAlertmanager runs the installed Alertmanager on a free loopback
// port, without clustering, routing every alert to receiver, and returns
// its base URL.
func startAlertmanager(tb testing.TB, receiver string) string {
	tb.Helper()
	bin := needBinary(tb, "prometheus-alertmanager", "alertmanager")
	dir := tb.TempDir()
	cfg := filepath.Join(dir, "alertmanager.yml")
	if err := os.WriteFile(cfg, []byte(fmt.Sprintf(`route:
  receiver: classwatch-test
  group_by: [alertname, model]
  group_wait: 200ms
  group_interval: 500ms
  repeat_interval: 1h
receivers:
  - name: classwatch-test
    webhook_configs:
      - url: %s
        send_resolved: true
`, receiver)), 0o600); err != nil {
		tb.Fatal(err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		tb.Fatal(err)
	}
	addr := l.Addr().String()
	l.Close()
	var out bytes.Buffer
	cmd := exec.Command(bin, "--config.file="+cfg, "--storage.path="+filepath.Join(dir, "data"),
		"--web.listen-address="+addr, "--cluster.listen-address=", "--log.level=warn")
	cmd.Stdout, cmd.Stderr = &out, &out
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
			tb.Logf("alertmanager output:\n%s", out.String())
		}
	})
	base := "http://" + addr
	deadline := time.Now().Add(20 * time.Second)
	for {
		resp, err := http.Get(base + "/-/ready")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return base
			}
		}
		select {
		case <-exited:
			tb.Fatalf("alertmanager exited:\n%s", out.String())
		case <-time.After(50 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			tb.Fatalf("alertmanager not ready at %s after 20s:\n%s", base, out.String())
		}
	}
}

func listAlerts(tb testing.TB, base string) []amAlert {
	tb.Helper()
	resp, err := http.Get(base + "/api/v2/alerts")
	if err != nil {
		tb.Fatalf("list alertmanager alerts: %v", err)
	}
	defer resp.Body.Close()
	var out []amAlert
	if err := json.NewDecoder(resp.Body).Decode(&out); err != nil {
		tb.Fatalf("decode alertmanager alerts: %v", err)
	}
	return out
}

// pollAlerts lists Alertmanager's alerts named alertname until ok accepts
// them, failing after 15s.
func pollAlerts(tb testing.TB, base, alertname string, ok func([]amAlert) bool) []amAlert {
	tb.Helper()
	deadline := time.Now().Add(15 * time.Second)
	for {
		var mine []amAlert
		for _, a := range listAlerts(tb, base) {
			if a.Labels["alertname"] == alertname {
				mine = append(mine, a)
			}
		}
		if ok(mine) {
			return mine
		}
		if time.Now().After(deadline) {
			tb.Fatalf("alertmanager alerts %+v never became as expected", mine)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestAlertmanagerEndToEnd fires an alert through the Alertmanager
// notifier into a real Alertmanager, restarts classwatch while it fires,
// then resolves it: Alertmanager lists it with our labels, keeps one alert
// with one start time across the restart, notifies its receiver once for
// the firing and once for the resolution.
func TestAlertmanagerEndToEnd(t *testing.T) {
	received := make(chan amWebhook, 10)
	receiver := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		var p amWebhook
		if err := json.Unmarshal(body, &p); err != nil {
			t.Errorf("alertmanager webhook %q: %v", body, err)
		}
		received <- p
	}))
	defer receiver.Close()
	base := startAlertmanager(t, receiver.URL)

	b := setup(t)
	opts := b.options(floorRule(1, 1))
	opts.Now = time.Now // Alertmanager judges end times by its own clock
	opts.Notifiers = []NotifierConfig{{Name: "oncall", Type: TypeAlertmanager, URL: Secret(base), RetryWait: 10 * time.Millisecond}}
	m1 := b.manager(t, opts)
	start(t, m1)

	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	firedAt := time.Now().UTC().Truncate(time.Second)
	evaluate(t, m1, firedAt)
	got := pollAlerts(t, base, "fraud-recall-floor", func(as []amAlert) bool { return len(as) == 1 })[0]
	for k, v := range map[string]string{"alertname": "fraud-recall-floor", "model": "card-fraud", "class": "fraud", "severity": "warning", "team": "payments-risk"} {
		if got.Labels[k] != v {
			t.Errorf("label %s = %q, want %q (labels %v)", k, got.Labels[k], v, got.Labels)
		}
	}
	if got.Status.State != "active" || !got.StartsAt.Equal(firedAt) || got.Annotations["summary"] == "" ||
		got.GeneratorURL != "http://classwatch.test:9640/v1/models/card-fraud/windows" {
		t.Errorf("alertmanager holds %+v; want active since %s with a summary and a generator URL", got, firedAt)
	}
	if !got.EndsAt.After(time.Now()) {
		t.Errorf("endsAt %s is not in the future", got.EndsAt)
	}
	if n := waitFor(t, received, 15*time.Second, "alertmanager's firing notification"); n.Status != "firing" {
		t.Fatalf("alertmanager notified %q, want firing", n.Status)
	}

	// Restart in the middle: the new process resends the firing alert.
	stop(t, m1)
	b.reopen(t)
	opts.Store, opts.Registerer = b.st, b.reg
	m2 := b.manager(t, opts)
	start(t, m2)
	deadline := time.Now().Add(15 * time.Second)
	for testutil.ToFloat64(m2.metrics.sent.WithLabelValues("oncall")) < 1 {
		if time.Now().After(deadline) {
			t.Fatal("restarted manager did not resend the firing alert")
		}
		time.Sleep(20 * time.Millisecond)
	}
	evaluate(t, m2, time.Now().UTC().Truncate(time.Second))
	again := pollAlerts(t, base, "fraud-recall-floor", func(as []amAlert) bool { return len(as) >= 1 })
	if len(again) != 1 || again[0].Fingerprint != got.Fingerprint || !again[0].StartsAt.Equal(firedAt) {
		t.Errorf("after restart alertmanager holds %+v, want the one alert since %s", again, firedAt)
	}
	// Alertmanager would send a second firing notification within a group
	// interval (500ms) if it saw a new alert.
	select {
	case n := <-received:
		t.Fatalf("alertmanager notified again after the restart: %+v", n)
	case <-time.After(1500 * time.Millisecond):
	}

	b.views.set(t, "card-fraud", dayWindow, binary, goodRecall, nil)
	evaluate(t, m2, time.Now().UTC().Truncate(time.Second))
	pollAlerts(t, base, "fraud-recall-floor", func(as []amAlert) bool {
		return len(as) == 0 || (len(as) == 1 && as[0].Status.State != "active")
	})
	n := waitFor(t, received, 15*time.Second, "alertmanager's resolved notification")
	if n.Status != "resolved" || len(n.Alerts) != 1 || !n.Alerts[0].StartsAt.Equal(firedAt) {
		t.Errorf("alertmanager notified %+v, want the alert since %s resolved", n, firedAt)
	}
}
