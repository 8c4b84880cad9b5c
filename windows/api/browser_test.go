package api_test

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/cdproto/emulation"
	"github.com/chromedp/cdproto/log"
	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/cdproto/runtime"
	"github.com/chromedp/chromedp"

	"github.com/classwatch/classwatch/windows/store"
)

// chromium returns the path of Debian's chromium, skipping the test when
// it is missing, except under CI (CI=true), where it must be installed.
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser"} {
		if path, err := exec.LookPath(name); err == nil {
			return path
		}
	}
	if os.Getenv("CI") == "true" {
		t.Fatal("chromium is not installed; .ci/run installs it")
	}
	t.Skip("chromium is not installed")
	return ""
}

// screenshotDir is $CLASSWATCH_SCREENSHOT_DIR, else a test directory.
func screenshotDir(t *testing.T) string {
	if dir := os.Getenv("CLASSWATCH_SCREENSHOT_DIR"); dir != "" {
		if err := os.MkdirAll(dir, 0o755); err != nil {
			t.Fatal(err)
		}
		return dir
	}
	return t.TempDir()
}

// browser watches one headless chromium: console errors, uncaught
// exceptions, error log entries and every request it makes.
type browser struct {
	ctx      context.Context
	mu       sync.Mutex
	problems []string
	requests []string
}

func newBrowser(t *testing.T) *browser {
	t.Helper()
	exe := chromium(t)
	// Not t.TempDir: chromium may still write its profile for a moment
	// after it was told to quit, which would fail the test's cleanup.
	profile, err := os.MkdirTemp("", "classwatch-chromium-*")
	if err != nil {
		t.Fatal(err)
	}
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(exe),
		chromedp.Headless, chromedp.NoSandbox, chromedp.DisableGPU, chromedp.NoFirstRun,
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.UserDataDir(profile),
		chromedp.WindowSize(1280, 900),
	}
	actx, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancel := chromedp.NewContext(actx)
	ctx, cancelTimeout := context.WithTimeout(ctx, 90*time.Second)
	t.Cleanup(func() {
		cancelTimeout()
		cancel()
		cancelAlloc()
		time.Sleep(100 * time.Millisecond)
		os.RemoveAll(profile) // best effort, see above
	})
	b := &browser{ctx: ctx}
	chromedp.ListenTarget(ctx, func(ev any) {
		b.mu.Lock()
		defer b.mu.Unlock()
		switch ev := ev.(type) {
		case *runtime.EventConsoleAPICalled:
			if ev.Type == runtime.APITypeError || ev.Type == runtime.APITypeWarning {
				b.problems = append(b.problems, fmt.Sprintf("console %s: %v", ev.Type, ev.Args))
			}
		case *runtime.EventExceptionThrown:
			b.problems = append(b.problems, "exception: "+ev.ExceptionDetails.Text)
		case *log.EventEntryAdded:
			if ev.Entry.Level == log.LevelError {
				b.problems = append(b.problems, "log error: "+ev.Entry.Text+" "+ev.Entry.URL)
			}
		case *network.EventRequestWillBeSent:
			b.requests = append(b.requests, ev.Request.URL)
		}
	})
	if err := chromedp.Run(ctx, log.Enable(), network.Enable(), runtime.Enable()); err != nil {
		t.Fatalf("start chromium: %v", err)
	}
	return b
}

// load opens base+path, saves a full-page screenshot and the page's HTML
// under dir, evaluates js (when not empty) into out, and returns what went
// wrong in the page and the requests that left base.
func (b *browser) load(t *testing.T, base, path, dir, shot, js string, out any) (problems, external []string) {
	t.Helper()
	b.mu.Lock()
	b.problems, b.requests = nil, nil
	b.mu.Unlock()
	var png []byte
	var html string
	actions := []chromedp.Action{chromedp.Navigate(base + path), chromedp.WaitReady("body"), chromedp.FullScreenshot(&png, 100),
		chromedp.OuterHTML("html", &html)}
	if js != "" {
		actions = append(actions, chromedp.Evaluate(js, out))
	}
	if err := chromedp.Run(b.ctx, actions...); err != nil {
		t.Fatalf("load %s: %v", path, err)
	}
	// Give late console messages and requests a moment to arrive.
	time.Sleep(200 * time.Millisecond)
	file := filepath.Join(dir, shot)
	if err := os.WriteFile(file, png, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(strings.TrimSuffix(file, ".png")+".html", []byte(html), 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot of %s: %s", path, file)
	b.mu.Lock()
	defer b.mu.Unlock()
	if len(b.requests) == 0 {
		problems = append(problems, "the browser made no request at all")
	}
	for _, u := range b.requests {
		if !strings.HasPrefix(u, base+"/") && !strings.HasPrefix(u, "data:") {
			external = append(external, u)
		}
	}
	return append(problems, b.problems...), external
}

// visit loads a page and fails the test on any problem or request that
// left base.
func (b *browser) visit(t *testing.T, base, path, dir, shot, js string, out any) {
	t.Helper()
	problems, external := b.load(t, base, path, dir, shot, js, out)
	for _, p := range problems {
		t.Errorf("%s: %s", path, p)
	}
	for _, u := range external {
		t.Errorf("%s: request left the daemon: %s", path, u)
	}
}

// TestBrowserWatchSeesProblems shows that the watch used above catches a
// console error, an uncaught exception and a request to another host.
func TestBrowserWatchSeesProblems(t *testing.T) {
	br := newBrowser(t)
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/html")
		// 192.0.2.1 is TEST-NET-1 (RFC 5737): never answers.
		fmt.Fprint(w, `<!doctype html><link rel="icon" href="data:,"><img src="http://192.0.2.1/x.png"><script>console.error("boom"); undefinedCall();</script>`)
	}))
	defer srv.Close()
	problems, external := br.load(t, srv.URL, "/", t.TempDir(), "bad.png", "", nil)
	joined := strings.Join(problems, "\n")
	if !strings.Contains(joined, "console error") || !strings.Contains(joined, "exception") {
		t.Errorf("problems = %q, want the console error and the exception", problems)
	}
	if len(external) != 1 || !strings.Contains(external[0], "192.0.2.1") {
		t.Errorf("external requests = %q, want the image on 192.0.2.1", external)
	}
}

// cellsJS reads the data attributes of the first heatmap's cells.
const cellsJS = `Array.from(document.querySelector('svg.cw-chart g.cell').closest('svg').querySelectorAll('g.cell')).map(g => [g.dataset.actual, g.dataset.predicted, g.dataset.count])`

// fillBrowserScenario stores a day of a support desk's ticket router with
// five classes, so that every picture has something to show.
func fillBrowserScenario(t *testing.T, b *testBundle) []string {
	classes := []string{"billing", "outage", "password", "refund", "other"}
	rng := rand.New(rand.NewPCG(7, 11))
	var preds []store.Prediction
	var labels []store.Label
	for i := range 600 {
		when := t0.Add(-20 * time.Hour).Add(time.Duration(i) * 2 * time.Minute)
		actual := classes[rng.IntN(len(classes))]
		predicted := actual
		if rng.Float64() < 0.25 {
			predicted = classes[rng.IntN(len(classes))]
		}
		id := fmt.Sprintf("tkt-%d", i)
		preds = append(preds, store.Prediction{ID: id, At: when, Predicted: predicted, Segment: []string{"email", "chat"}[i%2]})
		if rng.Float64() < 0.85 {
			labels = append(labels, store.Label{ID: id, Actual: actual, At: when.Add(time.Duration(rng.IntN(300)) * time.Minute)})
		}
	}
	b.predict(t, "ticket-router", classes, preds...)
	b.label(t, "ticket-router", labels...)
	b.saveAlert(t, "refund-recall-floor", "ticket-router", "refund", "firing", at(-30), 0.55, [2]float64{0.41, 0.68}, true)
	return classes
}

func TestPagesInChromium(t *testing.T) {
	br := newBrowser(t)
	b := setup(t)
	fillBrowserScenario(t, b)
	dir := screenshotDir(t)
	base := b.server.URL

	br.visit(t, base, "/", dir, "overview.png", "", nil)

	var cells [][]string
	br.visit(t, base, "/models/ticket-router", dir, "model.png", cellsJS, &cells)
	// The first heatmap is window 1h's: compare with the windows endpoint.
	var windows struct {
		Windows []struct {
			Classes []string
			Matrix  [][]int64
		}
	}
	b.get(t, "/v1/models/ticket-router/windows", &windows)
	compareCells(t, "model page", cells, windows.Windows[0].Classes, windows.Windows[0].Matrix)

	params := url.Values{"from": {rfc(t0.Add(-20 * time.Hour))}, "to": {rfc(t0)}, "as_of": {rfc(t0.Add(-time.Hour))}}
	var report struct {
		Data  string     `json:"data"`
		Cells [][]string `json:"cells"`
	}
	js := `({data: document.getElementById('classwatch-report').textContent, cells: ` + cellsJS + `})`
	br.visit(t, base, reportPath("ticket-router", params), dir, "report.png", js, &report)
	var embedded, matrix map[string]json.RawMessage
	if err := json.Unmarshal([]byte(report.Data), &embedded); err != nil {
		t.Fatalf("embedded report data: %v", err)
	}
	b.get(t, matrixPath("ticket-router", params), &matrix)
	for k, v := range matrix {
		if !jsonEqual(t, embedded[k], v) {
			t.Errorf("embedded %q = %s, matrix endpoint %s", k, embedded[k], v)
		}
	}
	var m struct {
		Classes []string
		Matrix  [][]int64
	}
	mustUnmarshal(t, mustJSON(t, matrix), &m)
	compareCells(t, "report", report.Cells, m.Classes, m.Matrix)

	// The report as printed on A4: 210 mm less the 2 × 12 mm margins of its
	// print stylesheet is 186 mm, 703 CSS pixels at 96 per inch. Nothing
	// may be wider than the paper.
	var png []byte
	var fits bool
	err := chromedp.Run(br.ctx, emulation.SetEmulatedMedia().WithMedia("print"), chromedp.EmulateViewport(703, 1000),
		chromedp.FullScreenshot(&png, 100), chromedp.Evaluate(`document.documentElement.scrollWidth <= 703`, &fits))
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "report-print.png"), png, 0o644); err != nil {
		t.Fatal(err)
	}
	if !fits {
		var wide []string
		chromedp.Run(br.ctx, chromedp.Evaluate(`Array.from(document.querySelectorAll('body *')).filter(e => e.getBoundingClientRect().right > 703).slice(0, 5).map(e => e.tagName + '.' + e.className.baseVal + e.className + ' ' + Math.round(e.getBoundingClientRect().right))`, &wide))
		t.Errorf("the printed report is wider than A4 paper: %q", wide)
	}
}

func compareCells(t *testing.T, where string, cells [][]string, classes []string, matrix [][]int64) {
	t.Helper()
	if len(cells) != len(classes)*len(classes) {
		t.Fatalf("%s: %d heatmap cells, want %d", where, len(cells), len(classes)*len(classes))
	}
	for i, c := range cells {
		a, p := classes[i/len(classes)], classes[i%len(classes)]
		want := fmt.Sprint(matrix[i/len(classes)][i%len(classes)])
		if c[0] != a || c[1] != p || c[2] != want {
			t.Errorf("%s: heatmap cell %d = %v, want [%s %s %s]", where, i, c, a, p, want)
		}
	}
}

func mustJSON(t *testing.T, v any) []byte {
	t.Helper()
	data, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return data
}
