package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// The in-process daemon tests: a fictional support desk's ticket router
// whose predictions and labels arrive over HTTP.
const deskConfig = `bucket: 5m
clock: event
refresh: 0s
windows: [{name: 1h, length: 1h}]
models:
  - name: desk-route
    classes: [billing, outage, other]
ingest: {max_future: 0}
`

// testConfig parses deskConfig plus extra for a daemon on a free port with
// its store under a temporary data_dir (or database, when set); env holds
// the environment the daemon sees.
func testConfig(t *testing.T, extra, database string, env map[string]string) config {
	t.Helper()
	text := deskConfig + extra + fmt.Sprintf("listen: 127.0.0.1:0\ndata_dir: %q\n", filepath.Join(t.TempDir(), "data"))
	if database != "" {
		text += fmt.Sprintf("database: %q\n", database)
	}
	cfg, err := parseConfig([]byte(text), configSource{secrets: true, getenv: func(k string) string { return env[k] }})
	if err != nil {
		t.Fatalf("config: %v\n%s", err, text)
	}
	return cfg
}

// inProcess is a daemon run by the test.
type inProcess struct {
	d      *daemon
	url    string
	cancel context.CancelFunc
	done   chan error // serve's result
	logs   *lockedBuffer
}

// startInProcess runs newDaemon, start and serve. The daemon stops when
// the test ends unless stopAndWait stopped it.
func startInProcess(t *testing.T, cfg config) *inProcess {
	t.Helper()
	p := launchInProcess(t, cfg)
	if err := p.d.start(context.Background()); err != nil {
		t.Fatalf("start: %v\n%s", err, p.logs)
	}
	p.serve()
	return p
}

// launchInProcess runs newDaemon only: the gate answers, the store is not
// reached yet.
func launchInProcess(t *testing.T, cfg config) *inProcess {
	t.Helper()
	logs := &lockedBuffer{}
	ctx, cancel := context.WithCancel(context.Background())
	d, err := newDaemon(ctx, cfg, slog.New(slog.NewTextHandler(logs, nil)))
	if err != nil {
		cancel()
		t.Fatalf("newDaemon: %v", err)
	}
	p := &inProcess{d: d, url: d.baseURL(), cancel: cancel, logs: logs}
	t.Cleanup(func() {
		p.cancel()
		if p.done != nil {
			<-p.done
		} else {
			_ = d.stop(context.Background())
		}
		if t.Failed() {
			t.Logf("daemon log:\n%s", logs)
		}
	})
	return p
}

// serve runs the daemon's serve in the background.
func (p *inProcess) serve() {
	p.done = make(chan error, 1)
	ctx, cancel := context.WithCancel(context.Background())
	stop := p.cancel
	p.cancel = func() { cancel(); stop() }
	go func() { p.done <- p.d.serve(ctx) }()
}

// stopAndWait cancels the daemon as SIGTERM would and returns serve's
// result and how long the teardown took.
func (p *inProcess) stopAndWait(t *testing.T, limit time.Duration) (error, time.Duration) {
	t.Helper()
	start := time.Now()
	p.cancel()
	select {
	case err := <-p.done:
		p.done = nil
		return err, time.Since(start)
	case <-time.After(limit):
		t.Fatalf("serve did not return within %s of the stop", limit)
		return nil, 0
	}
}

// get fetches path and returns the status and body.
func get(t *testing.T, client *http.Client, target string, header http.Header) (int, string) {
	t.Helper()
	req, err := http.NewRequest(http.MethodGet, target, nil)
	if err != nil {
		t.Fatal(err)
	}
	for k, v := range header {
		req.Header[k] = v
	}
	resp, err := client.Do(req)
	if err != nil {
		t.Fatalf("GET %s: %v", target, err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(body)
}

// post sends NDJSON lines and returns the status.
func post(t *testing.T, target string, lines ...string) int {
	t.Helper()
	resp, err := http.Post(target, "application/x-ndjson", strings.NewReader(strings.Join(lines, "\n")+"\n"))
	if err != nil {
		t.Fatalf("POST %s: %v", target, err)
	}
	defer resp.Body.Close()
	_, _ = io.Copy(io.Discard, resp.Body)
	return resp.StatusCode
}

// deskPrediction is one prediction line of the desk router.
func deskPrediction(id string, at time.Time) string {
	return fmt.Sprintf(`{"model":"desk-route","id":%q,"at":%q,"predicted":"billing"}`, id, at.UTC().Format(time.RFC3339))
}

// proxy forwards TCP connections from a listener to target, standing in
// for a database host that is down until the test starts the proxy. It
// closes every connection when the test ends.
func proxy(t *testing.T, l net.Listener, target string) {
	t.Helper()
	var (
		wg    sync.WaitGroup
		mu    sync.Mutex
		conns []net.Conn
	)
	t.Cleanup(func() {
		l.Close()
		mu.Lock()
		for _, c := range conns {
			c.Close()
		}
		mu.Unlock()
		wg.Wait()
	})
	wg.Add(1)
	go func() {
		defer wg.Done()
		for {
			in, err := l.Accept()
			if err != nil {
				return
			}
			out, err := net.Dial("tcp", target)
			if err != nil {
				in.Close()
				continue
			}
			mu.Lock()
			conns = append(conns, in, out)
			mu.Unlock()
			wg.Add(2)
			go func() { defer wg.Done(); _, _ = io.Copy(out, in); out.Close() }()
			go func() { defer wg.Done(); _, _ = io.Copy(in, out); in.Close() }()
		}
	}()
}

// TestStartWaitsForStore starts the daemon while its PostgreSQL is
// unreachable: /readyz says why, other routes answer 503 with Retry-After,
// and once the database answers the daemon starts and is ready.
func TestStartWaitsForStore(t *testing.T) {
	u, err := url.Parse(pgtest.URL(t))
	if err != nil {
		t.Skipf("the test database is not a URL: %v", err)
	}
	server := u.Host
	hold, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	u.Host = hold.Addr().String()
	hold.Close() // nothing listens there until the proxy starts

	p := launchInProcess(t, testConfig(t, "store_wait: 1m\n", u.String(), nil))
	started := make(chan error, 1)
	go func() { started <- p.d.start(context.Background()) }()

	deadline := time.Now().Add(20 * time.Second)
	for {
		code, body := get(t, http.DefaultClient, p.url+"/readyz", nil)
		if code == http.StatusServiceUnavailable && strings.Contains(body, "waiting for the store") && strings.Contains(body, "attempt 2") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("/readyz = %d %s, want 503 naming the wait for the store", code, body)
		}
		time.Sleep(50 * time.Millisecond)
	}
	if _, body := get(t, http.DefaultClient, p.url+"/readyz", nil); strings.Contains(body, u.User.Username()) || strings.Contains(body, u.Host) {
		t.Errorf("/readyz names the database user or host: %s", body)
	}
	resp, err := http.Get(p.url + "/v1/models")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusServiceUnavailable || resp.Header.Get("Retry-After") == "" {
		t.Errorf("/v1/models while starting = %d (Retry-After %q), want 503 with Retry-After", resp.StatusCode, resp.Header.Get("Retry-After"))
	}
	if code, _ := get(t, http.DefaultClient, p.url+"/healthz", nil); code != http.StatusOK {
		t.Errorf("/healthz while starting = %d, want 200", code)
	}

	l, err := net.Listen("tcp", u.Host)
	if err != nil {
		t.Fatalf("take the database address back: %v", err)
	}
	proxy(t, l, server)
	select {
	case err := <-started:
		if err != nil {
			t.Fatalf("start after the database came up: %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("start did not return within 30s of the database coming up")
	}
	p.serve()
	if code, body := get(t, http.DefaultClient, p.url+"/readyz", nil); code != http.StatusOK {
		t.Errorf("/readyz after start = %d %s, want 200", code, body)
	}
	if code := post(t, p.url+"/v1/predictions", deskPrediction("tk-1", time.Date(2026, 5, 4, 9, 0, 0, 0, time.UTC))); code != http.StatusOK {
		t.Errorf("POST after start = %d, want 200", code)
	}
}

// TestStoreWaitGivesUp checks that start fails once store_wait has passed,
// with the store's error.
func TestStoreWaitGivesUp(t *testing.T) {
	hold, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := hold.Addr().String()
	hold.Close()
	p := launchInProcess(t, testConfig(t, "store_wait: 1s\n", "postgres://classwatch@"+addr+"/cw?connect_timeout=1", nil))
	start := time.Now()
	err = p.d.start(context.Background())
	if err == nil || !strings.Contains(err.Error(), "migrate") {
		t.Fatalf("start = %v, want the store's error", err)
	}
	if took := time.Since(start); took > 15*time.Second {
		t.Errorf("start gave up after %s, want about store_wait (1s)", took)
	}
}

// mountTmpfs mounts a tmpfs of the given size (and options) at a new
// directory, for a real full or read-only file system. It needs root:
// elsewhere the test is skipped, except under CI.
func mountTmpfs(t *testing.T, size string, readOnly bool) string {
	t.Helper()
	dir := t.TempDir()
	opts := "size=" + size
	if readOnly {
		opts += ",ro"
	}
	if err := mountFS(dir, opts); err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatalf("mount a tmpfs (CI runs as root): %v", err)
		}
		t.Skipf("cannot mount a tmpfs here: %v", err)
	}
	t.Cleanup(func() {
		if err := unmountFS(dir); err != nil {
			t.Errorf("unmount %s: %v", dir, err)
		}
	})
	return dir
}

// fill writes a file into dir until the file system is full and returns
// its path.
func fill(t *testing.T, dir string) string {
	t.Helper()
	path := filepath.Join(dir, "filler")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	chunk := make([]byte, 64<<10)
	for {
		if _, err := f.Write(chunk); err != nil {
			break
		}
	}
	for {
		if _, err := f.Write(chunk[:512]); err != nil {
			return path
		}
	}
}

// TestReadyFollowsCommits fills the SQLite store's file system: the batch
// gets 503, /readyz turns unready and says why, and once space is free
// again a batch commits and /readyz is ready.
func TestReadyFollowsCommits(t *testing.T) {
	dir := mountTmpfs(t, "8m", false)
	cfg := testConfig(t, "", "", nil)
	cfg.DataDir = filepath.Join(dir, "data")
	p := startInProcess(t, cfg)
	at := time.Date(2026, 5, 4, 9, 0, 0, 0, time.UTC)
	if code := post(t, p.url+"/v1/predictions", deskPrediction("tk-0", at)); code != http.StatusOK {
		t.Fatalf("first POST = %d", code)
	}
	filler := fill(t, dir)
	var lines []string
	for i := range 2000 {
		lines = append(lines, deskPrediction(fmt.Sprintf("tk-full-%04d-%s", i, strings.Repeat("x", 200)), at))
	}
	if code := post(t, p.url+"/v1/predictions", lines...); code != http.StatusServiceUnavailable {
		t.Fatalf("POST on a full disk = %d, want 503", code)
	}
	code, body := get(t, http.DefaultClient, p.url+"/readyz", nil)
	if code != http.StatusServiceUnavailable || !strings.Contains(body, "could not commit") {
		t.Errorf("/readyz on a full disk = %d %s, want 503 saying the store could not commit", code, body)
	}
	if err := os.Remove(filler); err != nil {
		t.Fatal(err)
	}
	if code := post(t, p.url+"/v1/predictions", lines[:20]...); code != http.StatusOK {
		t.Fatalf("POST after freeing space = %d, want 200", code)
	}
	if code, body := get(t, http.DefaultClient, p.url+"/readyz", nil); code != http.StatusOK {
		t.Errorf("/readyz after a commit = %d %s, want 200", code, body)
	}
}

// TestReadOnlyDataDir checks the start-up error of an embedded store on a
// read-only file system: it names the path and what to do.
func TestReadOnlyDataDir(t *testing.T) {
	dir := mountTmpfs(t, "1m", true)
	cfg := testConfig(t, "", "", nil)
	cfg.DataDir = filepath.Join(dir, "data")
	p := launchInProcess(t, cfg)
	err := p.d.start(context.Background())
	if err == nil {
		t.Fatal("start on a read-only data_dir succeeded")
	}
	for _, want := range []string{cfg.DataDir, "read-only file system", "set data_dir to a writable directory"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q lacks %q", err, want)
		}
	}
	// An existing directory that is read-only.
	cfg.DataDir = dir
	p = launchInProcess(t, cfg)
	if err := p.d.start(context.Background()); err == nil || !strings.Contains(err.Error(), "data_dir "+dir+" is not writable") {
		t.Errorf("start on a read-only existing data_dir = %v", err)
	}
}

// TestShutdownCutsStalledBody stops the daemon while a client has sent
// half a request body and then nothing: the body is cut (503, so the
// client may resend), the teardown finishes well within the HTTP drain
// budget and serve returns no error.
func TestShutdownCutsStalledBody(t *testing.T) {
	p := startInProcess(t, testConfig(t, "", "", nil))
	conn, err := net.Dial("tcp", p.d.addr())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	line := deskPrediction("tk-stall", time.Date(2026, 5, 4, 9, 0, 0, 0, time.UTC))
	fmt.Fprintf(conn, "POST /v1/predictions HTTP/1.1\r\nHost: x\r\nContent-Type: application/x-ndjson\r\nContent-Length: %d\r\n\r\n%s", 10*len(line), line)
	time.Sleep(200 * time.Millisecond) // the request reaches its handler

	err, took := p.stopAndWait(t, 2*httpDrainBudget)
	if err != nil {
		t.Errorf("serve after the stop = %v, want nil", err)
	}
	if took >= httpDrainBudget {
		t.Errorf("teardown took %s, want less than the drain budget %s", took, httpDrainBudget)
	}
	_ = conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
	if err != nil {
		t.Fatalf("read the stalled request's answer: %v", err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusServiceUnavailable || resp.Header.Get("Retry-After") == "" {
		t.Errorf("stalled request answered %d (Retry-After %q), want 503 with Retry-After", resp.StatusCode, resp.Header.Get("Retry-After"))
	}
}

// TestReadTokens checks what a read token guards: the read API, /metrics
// and the pages; /healthz, /readyz and ingest (which has its own tokens)
// stay open.
func TestReadTokens(t *testing.T) {
	const secret = "rd-0f9e8d7c"
	p := startInProcess(t, testConfig(t, "read: {tokens: [{name: dashboards, token_env: CW_READ}]}\n", "", map[string]string{"CW_READ": secret}))
	bearer := http.Header{"Authorization": {"Bearer " + secret}}
	wrong := http.Header{"Authorization": {"Bearer rd-wrong"}}
	req, _ := http.NewRequest(http.MethodGet, "/", nil)
	req.SetBasicAuth("anyone", secret)
	basic := http.Header{"Authorization": req.Header["Authorization"]}
	for _, path := range []string{"/v1/models", "/v1/models/desk-route/windows", "/metrics", "/", "/v1/alerts"} {
		if code, _ := get(t, http.DefaultClient, p.url+path, nil); code != http.StatusUnauthorized {
			t.Errorf("GET %s without a token = %d, want 401", path, code)
		}
		if code, _ := get(t, http.DefaultClient, p.url+path, wrong); code != http.StatusUnauthorized {
			t.Errorf("GET %s with a wrong token = %d, want 401", path, code)
		}
		for name, h := range map[string]http.Header{"bearer": bearer, "basic": basic} {
			if code, _ := get(t, http.DefaultClient, p.url+path, h); code != http.StatusOK {
				t.Errorf("GET %s with the %s token = %d, want 200", path, name, code)
			}
		}
	}
	for _, path := range []string{"/healthz", "/readyz"} {
		if code, _ := get(t, http.DefaultClient, p.url+path, nil); code != http.StatusOK {
			t.Errorf("GET %s without a token = %d, want 200", path, code)
		}
	}
	if code := post(t, p.url+"/v1/predictions", deskPrediction("tk-1", time.Date(2026, 5, 4, 9, 0, 0, 0, time.UTC))); code != http.StatusOK {
		t.Errorf("POST without a read token = %d, want 200 (ingest has no tokens here)", code)
	}
}
