package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// TestBacktestCommand runs "classwatch rules backtest" in process on a
// small stored history: a table and JSON answer, and exit status 2 with a
// clear message for a reversed range, an unknown rule and a window that
// reaches into purged raw rows (README.md "Rule backtest").
func TestBacktestCommand(t *testing.T) {
	ctx := t.Context()
	dir := t.TempDir()
	cfg := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(cfg, []byte(`data_dir: `+filepath.Join(dir, "data")+`
bucket: 1h
windows:
  - {name: day, length: 24h}
models:
  - {name: card-screen, classes: [legit, fraud]}
alerts:
  - {name: recall-floor, kind: floor, model: card-screen, window: day, metric: recall, classes: [fraud], threshold: 0.8, schedule: "0 * * * *"}
`), 0o600); err != nil {
		t.Fatal(err)
	}
	loaded, err := loadConfig(configSource{path: cfg})
	if err != nil {
		t.Fatal(err)
	}
	st, err := openStore(ctx, loaded)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Migrate(ctx); err != nil {
		t.Fatal(err)
	}
	if _, err := st.EnsureModel(ctx, "card-screen", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	// Two days of 40 frauds an hour, every one caught until noon of the
	// first day and half of them after.
	day := time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC)
	var preds []store.Prediction
	var labels []store.Label
	for h := range 48 {
		for i := range 40 {
			at := day.Add(time.Duration(h)*time.Hour + time.Duration(i)*time.Minute)
			predicted := "fraud"
			if h >= 12 && i%2 == 0 {
				predicted = "legit"
			}
			id := at.Format(time.RFC3339)
			preds = append(preds, store.Prediction{Model: "card-screen", ID: id, At: at, Bucket: at.Truncate(time.Hour), Predicted: predicted})
			labels = append(labels, store.Label{Model: "card-screen", ID: id, Actual: "fraud", At: at})
		}
	}
	if _, err := st.IngestPredictions(ctx, preds, day.Add(72*time.Hour)); err != nil {
		t.Fatal(err)
	}
	if _, err := st.IngestLabels(ctx, labels, day.Add(72*time.Hour)); err != nil {
		t.Fatal(err)
	}

	backtest := func(args ...string) (string, string, int) {
		var out, errb bytes.Buffer
		err := run(ctx, append([]string{"rules", "backtest", "--config", cfg}, args...), &out, &errb)
		code := exitCode(err, &errb)
		return out.String(), errb.String(), code
	}
	out, errs, code := backtest("--from", "2026-06-01T00:00:00Z", "--to", "2026-06-03T00:00:00Z")
	if code != 0 || !strings.Contains(out, "recall-floor") || !strings.Contains(out, "2026-06-01T") {
		t.Errorf("table: exit %d\n%s%s", code, out, errs)
	}
	out, _, code = backtest("--from", "2026-06-01T00:00:00Z", "--to", "2026-06-03T00:00:00Z", "--format", "json")
	if code != 0 || !strings.Contains(out, `"evaluations": 48`) || !strings.Contains(out, `"firing_at": "2026-06-01T`) {
		t.Errorf("json: exit %d\n%s", code, out)
	}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--from", "2026-06-03T00:00:00Z", "--to", "2026-06-01T00:00:00Z"}, "is not before"},
		{[]string{"--from", "2026-06-01T00:00:00Z", "--to", "2026-06-03T00:00:00Z", "--rule", "nope"}, `no rule named "nope"`},
		{[]string{"--from", "yesterday", "--to", "2026-06-03T00:00:00Z"}, "not an RFC 3339 time"},
	} {
		if _, errs, code := backtest(c.args...); code != 2 || !strings.Contains(errs, c.want) {
			t.Errorf("%v: exit %d, stderr %q; want 2 and %q", c.args, code, errs, c.want)
		}
	}
	if _, err := st.PurgeRaw(ctx, "card-screen", day.Add(24*time.Hour)); err != nil {
		t.Fatal(err)
	}
	st.Close()
	if _, errs, code := backtest("--from", "2026-06-02T12:00:00Z", "--to", "2026-06-03T00:00:00Z"); code != 2 || !strings.Contains(errs, "before the raw rows the store retains") {
		t.Errorf("window reaching into purged rows: exit %d, stderr %q; want 2 and a message saying so", code, errs)
	}
}
