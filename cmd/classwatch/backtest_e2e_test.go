package main

import (
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"
)

// The backtest agreement test runs the real daemon with one-second
// buckets, windows of seconds and rules evaluated every second on the wall
// clock, feeds it a history in real time (a card screen's fraud recall
// falls for eight seconds; then the model is silent for five), records the
// alert state changes the daemon made (GET /v1/alerts/history), and checks
// that "classwatch rules backtest" over the same seconds reports exactly
// the same episodes (README.md "Rule backtest").
//
// Each second s gets its predictions and labels dated s+0.3 and posted at
// s+0.5, half a second from the evaluations at s and s+1, so the daemon's
// evaluation at s+1 sees them and the one at s does not, as the backtest
// assumes.

const btModel = "card-screen"

func writeBacktestE2EConfig(tb testing.TB) string {
	tb.Helper()
	dir := tb.TempDir()
	cfg := fmt.Sprintf(`data_dir: %q
database: ""
bucket: 1s
clock: wall
windows:
  - {name: now, length: 4s}
  - {name: before, length: 12s, lag: 4s}
models:
  - name: %s
    classes: [legit, fraud]
alerts:
  - name: recall-floor
    kind: floor
    model: %s
    window: now
    metric: recall
    classes: [fraud]
    threshold: 0.6
    min_count: 20
    schedule: "@every 1s"
    fire_after: 2
    resolve_after: 2
  - name: recall-drop
    kind: drop
    model: %s
    window: now
    classes: [fraud]
    margin: 0.1
    min_count: 20
    reference: {window: before}
    schedule: "@every 1s"
  - name: quiet
    kind: no_traffic
    model: %s
    quiet_for: 3s
    schedule: "@every 1s"
`, filepath.Join(dir, "data"), btModel, btModel, btModel, btModel)
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(cfg), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}

// btEpisode is an episode as both sides report it.
type btEpisode struct {
	Rule, Model, Class string
	FiringAt           time.Time
	ResolvedAt         *time.Time
}

func (e btEpisode) String() string {
	end := "still firing"
	if e.ResolvedAt != nil {
		end = e.ResolvedAt.Format("15:04:05")
	}
	return fmt.Sprintf("%s/%s/%s %s→%s", e.Rule, e.Model, e.Class, e.FiringAt.Format("15:04:05"), end)
}

func TestBacktestAgreesWithDaemon(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the binary in real time for about 40s; skipped with -short")
	}
	bin := buildBinary(t)
	cfg := writeBacktestE2EConfig(t)
	d := startDaemon(t, bin, cfg)
	t0 := time.Now().UTC().Truncate(time.Second).Add(time.Second)

	const seconds = 35
	for s := range seconds {
		if s >= 25 && s < 30 {
			continue // silence
		}
		caught := 9 // of 10 frauds
		if s >= 10 && s < 18 {
			caught = 3
		}
		post := t0.Add(time.Duration(s)*time.Second + 500*time.Millisecond)
		time.Sleep(time.Until(post))
		postSecond(t, d.url, s, t0.Add(time.Duration(s)*time.Second+300*time.Millisecond), caught)
		if late := time.Since(post); late > 400*time.Millisecond {
			t.Fatalf("second %d: posting took until %s after s+0.5; the test's timing assumption does not hold on this host", s, late)
		}
	}
	end := t0.Add((seconds + 3) * time.Second)
	time.Sleep(time.Until(end.Add(300 * time.Millisecond)))
	daemon := daemonEpisodes(t, d.url, t0, end)
	d.stop(t)

	out := runCommand(t, bin, "rules", "backtest", "--config", cfg,
		"--from", t0.Format(time.RFC3339), "--to", end.Format(time.RFC3339), "--format", "json")
	var rep struct {
		Rules []struct {
			Rule        string `json:"rule"`
			Evaluations int    `json:"evaluations"`
			Episodes    []struct {
				Model      string     `json:"model"`
				Class      *string    `json:"class"`
				FiringAt   time.Time  `json:"firing_at"`
				ResolvedAt *time.Time `json:"resolved_at"`
			} `json:"episodes"`
		} `json:"rules"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("decode backtest JSON: %v\n%s", err, out)
	}
	var replay []btEpisode
	for _, r := range rep.Rules {
		if r.Evaluations != seconds+3 {
			t.Errorf("rule %s: %d evaluations, want %d (one a second)", r.Rule, r.Evaluations, seconds+3)
		}
		for _, e := range r.Episodes {
			class := ""
			if e.Class != nil {
				class = *e.Class
			}
			replay = append(replay, btEpisode{Rule: r.Rule, Model: e.Model, Class: class, FiringAt: e.FiringAt, ResolvedAt: e.ResolvedAt})
		}
	}
	sortEpisodes(replay)
	if !slices.EqualFunc(daemon, replay, sameBtEpisode) {
		t.Errorf("episodes differ:\n daemon   %v\n backtest %v", daemon, replay)
	}
	t.Logf("daemon and backtest episodes: %v", daemon)
	for _, rule := range []string{"recall-floor", "recall-drop", "quiet"} {
		if !slices.ContainsFunc(daemon, func(e btEpisode) bool { return e.Rule == rule }) {
			t.Errorf("the daemon never fired %s; the history is made to trip it\n%v", rule, daemon)
		}
	}
}

// postSecond sends one second of traffic dated at: 10 frauds, caught of
// them predicted fraud, and 10 legitimate payments, one flagged, each
// with its label.
func postSecond(tb testing.TB, base string, s int, at time.Time, caught int) {
	tb.Helper()
	var preds, labels []string
	for i := range 20 {
		actual, predicted := "legit", "legit"
		switch {
		case i < 10:
			actual = "fraud"
			if i < caught {
				predicted = "fraud"
			}
		case i == 10:
			predicted = "fraud"
		}
		id := fmt.Sprintf("s%02d-%02d", s, i)
		when := at.Add(time.Duration(i) * time.Millisecond).Format(time.RFC3339Nano)
		preds = append(preds, fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"predicted":%q}`, btModel, id, when, predicted))
		labels = append(labels, fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"actual":%q}`, btModel, id, when, actual))
	}
	postAll(tb, base+"/v1/predictions", preds)
	postAll(tb, base+"/v1/labels", labels)
}

// daemonEpisodes reads the daemon's state changes in [from, to) and pairs
// each firing with the resolution that ended it.
func daemonEpisodes(tb testing.TB, base string, from, to time.Time) []btEpisode {
	tb.Helper()
	var body struct {
		History []cwAlert `json:"history"`
	}
	q := url.Values{"from": {from.Add(-time.Hour).Format(time.RFC3339)}, "to": {to.Format(time.RFC3339)}, "limit": {"10000"}}
	getJSON(tb, base+"/v1/alerts/history?"+q.Encode(), http.StatusOK, &body)
	slices.Reverse(body.History) // oldest first
	var out []btEpisode
	open := map[string]int{}
	for _, h := range body.History {
		i, firing := open[h.Key]
		switch {
		case h.State == "firing" && !firing:
			open[h.Key] = len(out)
			out = append(out, btEpisode{Rule: h.Rule, Model: h.Labels["model"], Class: h.Labels["class"], FiringAt: h.StartsAt})
		case h.State != "firing" && firing:
			end := h.EndsAt
			out[i].ResolvedAt = &end
			delete(open, h.Key)
		}
	}
	sortEpisodes(out)
	return out
}

func sortEpisodes(es []btEpisode) {
	slices.SortStableFunc(es, func(a, b btEpisode) int {
		if c := a.FiringAt.Compare(b.FiringAt); c != 0 {
			return c
		}
		return strings.Compare(a.Rule, b.Rule)
	})
}

func sameBtEpisode(a, b btEpisode) bool {
	return a.Rule == b.Rule && a.Model == b.Model && a.Class == b.Class && a.FiringAt.Equal(b.FiringAt) &&
		(a.ResolvedAt == nil) == (b.ResolvedAt == nil) && (a.ResolvedAt == nil || a.ResolvedAt.Equal(*b.ResolvedAt))
}
