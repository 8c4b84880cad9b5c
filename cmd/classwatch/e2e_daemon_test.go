package main

import (
	"bufio"
	"bytes"
	"fmt"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"
)

// The end-to-end tests' running of the classwatch binary as a child process.

// buildBinary builds this package's command once for the test.
func buildBinary(tb testing.TB) string {
	tb.Helper()
	bin := filepath.Join(tb.TempDir(), "classwatch")
	// "go test" runs with its own go command first on PATH.
	cmd := exec.Command("go", "build", "-o", bin, ".")
	if out, err := cmd.CombinedOutput(); err != nil {
		tb.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// writeE2EConfig writes the daemon's config: the fixture's model, bucket,
// confidence and windows, the event clock, and no limit on event times
// (the fixture's times are fixed, so they may lie ahead of the clock).
func writeE2EConfig(tb testing.TB, fx e2eFixture, database string) string {
	tb.Helper()
	dir := tb.TempDir()
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %q\n", filepath.Join(dir, "data"))
	fmt.Fprintf(&b, "database: %q\n", database)
	fmt.Fprintf(&b, "bucket: %s\nconfidence: %v\nclock: event\n", fx.Bucket, fx.Confidence)
	b.WriteString("windows:\n")
	for _, name := range sortedKeys(fx.Windows) {
		w := fx.Windows[name]
		fmt.Fprintf(&b, "  - {name: %q, length: %s, lag: %s}\n", name, w.Length, w.Lag)
	}
	fmt.Fprintf(&b, "models:\n  - name: %q\n    classes: [%s]\n", fx.Model, strings.Join(fx.Classes, ", "))
	b.WriteString("ingest: {max_future: 0}\n")
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(b.String()), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}

// childEnv is this process's environment without the variable that would
// override the config's database.
func childEnv() []string {
	return slices.DeleteFunc(os.Environ(), func(kv string) bool {
		return strings.HasPrefix(kv, databaseURLEnv+"=")
	})
}

// lockedBuffer collects a child's output while the test may read it.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// runningDaemon is a "classwatch serve" child process.
type runningDaemon struct {
	cmd    *exec.Cmd
	url    string // http://ADDR, no trailing slash
	stderr *lockedBuffer
	// done is closed when the process has exited; waitErr is then
	// cmd.Wait's result.
	done    chan struct{}
	waitErr error
}

// startDaemon runs "classwatch serve" on a free port and waits for the
// line announcing its address. The process is killed when tb ends unless
// stop ended it.
func startDaemon(tb testing.TB, bin, cfg string) *runningDaemon {
	tb.Helper()
	cmd := exec.Command(bin, "serve", "--config", cfg, "--listen", "127.0.0.1:0")
	cmd.Env = childEnv()
	d := &runningDaemon{cmd: cmd, stderr: &lockedBuffer{}, done: make(chan struct{})}
	cmd.Stderr = d.stderr
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		tb.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		tb.Fatalf("start classwatch serve: %v", err)
	}
	tb.Cleanup(func() {
		select {
		case <-d.done:
		default:
			_ = cmd.Process.Kill()
			<-d.done
		}
		if tb.Failed() {
			tb.Logf("classwatch serve stderr:\n%s", d.stderr)
		}
	})

	addr := make(chan string, 1)
	go func() {
		// Read every line, so the child never blocks on a full pipe, and
		// wait for the process only once stdout is drained, as exec asks.
		const prefix = "classwatch listening on "
		sc := bufio.NewScanner(stdout)
		for sc.Scan() {
			if u, ok := strings.CutPrefix(sc.Text(), prefix); ok {
				addr <- strings.TrimSuffix(u, "/")
			}
		}
		d.waitErr = cmd.Wait()
		close(d.done)
	}()
	select {
	case d.url = <-addr:
	case <-d.done:
		tb.Fatalf("classwatch serve exited before listening: %v\n%s", d.waitErr, d.stderr)
	case <-time.After(30 * time.Second):
		tb.Fatalf("classwatch serve did not print its address within 30s\n%s", d.stderr)
	}
	d.waitStarted(tb, 30*time.Second)
	return d
}

// waitStarted polls until the routes answer: the address is printed
// before the store is reached and the routes are wired, and until then
// every route but /healthz and /readyz answers 503. (/readyz itself may
// stay 503 afterwards, for example while a stream source is down.)
func (d *runningDaemon) waitStarted(tb testing.TB, limit time.Duration) {
	tb.Helper()
	deadline := time.Now().Add(limit)
	for {
		resp, err := http.Get(d.url + "/v1/models")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode != http.StatusServiceUnavailable {
				return
			}
		}
		select {
		case <-d.done:
			tb.Fatalf("classwatch serve exited before it started: %v\n%s", d.waitErr, d.stderr)
		case <-time.After(50 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			tb.Fatalf("classwatch serve not started within %s (last: %v)\n%s", limit, err, d.stderr)
		}
	}
}

// stop sends SIGTERM and expects a clean exit well within the daemon's
// own shutdown bound.
func (d *runningDaemon) stop(tb testing.TB) {
	tb.Helper()
	if err := d.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		tb.Fatalf("signal classwatch serve: %v", err)
	}
	select {
	case <-d.done:
		if d.waitErr != nil {
			tb.Errorf("classwatch serve after SIGTERM: %v, want exit status 0", d.waitErr)
		}
	case <-time.After(10 * time.Second):
		tb.Fatalf("classwatch serve still running 10s after SIGTERM")
	}
}

// runCommand runs a classwatch subcommand to completion and returns its
// stdout, failing tb unless it exits with status 0.
func runCommand(tb testing.TB, bin string, args ...string) string {
	tb.Helper()
	cmd := exec.Command(bin, args...)
	cmd.Env = childEnv()
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	if err := cmd.Run(); err != nil {
		tb.Fatalf("classwatch %s: %v, want exit status 0\nstdout:\n%s\nstderr:\n%s", strings.Join(args, " "), err, &stdout, &stderr)
	}
	return stdout.String()
}
