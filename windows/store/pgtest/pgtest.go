// Package pgtest gives each test a PostgreSQL schema of its own.
//
// URL returns a connection URL whose search_path names a fresh, empty
// schema that is dropped when the test ends. The server is the one named by
// CLASSWATCH_TEST_DATABASE_URL when that is set; otherwise pgtest starts a
// throwaway cluster (initdb and postgres from PATH or
// /usr/lib/postgresql/*/bin) in a temporary directory on a free port, once
// per test process, and Main stops it when the tests are done. Running as
// root, the cluster runs as the unprivileged "postgres" user, since
// PostgreSQL refuses to run as root.
//
// With neither a URL nor the binaries the test is skipped, except under CI
// (CI=true), where a missing PostgreSQL fails it: CI must not pass by
// testing nothing.
//
// A package that may start the throwaway cluster uses Main:
//
//	func TestMain(m *testing.M) { pgtest.Main(m) }
package pgtest

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"net"
	"net/url"
	"os"
	"os/exec"
	"os/user"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

// EnvURL names the environment variable holding the test server's URL.
const EnvURL = "CLASSWATCH_TEST_DATABASE_URL"

// shared is the process's throwaway cluster. It is package state on
// purpose: the cluster costs seconds to start, so every test of the process
// shares it, and Main, which owns the process's lifetime, stops it.
var shared struct {
	mu      sync.Mutex
	main    bool     // Main is running the tests
	started bool     // start was attempted
	url     string   // the cluster's base URL
	err     error    // why the cluster could not start
	missing bool     // err means "no PostgreSQL binaries here"
	c       *cluster // the running cluster, nil if none
}

// Main runs the tests of m, stops the throwaway cluster if one was started
// and exits with the tests' status.
func Main(m *testing.M) {
	shared.mu.Lock()
	shared.main = true
	shared.mu.Unlock()
	code := m.Run()
	shared.mu.Lock()
	c := shared.c
	shared.c = nil
	shared.mu.Unlock()
	if c != nil {
		if err := c.stop(); err != nil {
			fmt.Fprintf(os.Stderr, "pgtest: stop cluster: %v\n", err)
		}
	}
	os.Exit(code)
}

// URL returns a connection URL to a fresh, empty schema for tb, dropped
// when tb ends. The URL sets search_path, so unqualified names resolve in
// the test's schema.
func URL(tb testing.TB) string {
	tb.Helper()
	base := BaseURL(tb)
	schema := "cwtest_" + randomSuffix(tb)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	conn, err := pgx.Connect(ctx, base)
	if err != nil {
		tb.Fatalf("pgtest: connect to %s: %v", redact(base), err)
	}
	defer conn.Close(ctx)
	ident := pgx.Identifier{schema}.Sanitize()
	if _, err := conn.Exec(ctx, "CREATE SCHEMA "+ident); err != nil {
		tb.Fatalf("pgtest: create schema: %v", err)
	}
	tb.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		defer cancel()
		conn, err := pgx.Connect(ctx, base)
		if err != nil {
			tb.Errorf("pgtest: connect to drop schema %s: %v", schema, err)
			return
		}
		defer conn.Close(ctx)
		if _, err := conn.Exec(ctx, "DROP SCHEMA "+ident+" CASCADE"); err != nil {
			tb.Errorf("pgtest: drop schema %s: %v", schema, err)
		}
	})
	return withSearchPath(tb, base, schema)
}

// BaseURL returns the URL of the test server itself (its default schema),
// starting the throwaway cluster if needed. Tests that need a schema of
// their own use URL.
func BaseURL(tb testing.TB) string {
	tb.Helper()
	if u := os.Getenv(EnvURL); u != "" {
		return u
	}
	shared.mu.Lock()
	defer shared.mu.Unlock()
	if !shared.started {
		shared.started = true
		if !shared.main {
			shared.err = errors.New("the package's TestMain must call pgtest.Main, which stops the throwaway cluster")
		} else {
			shared.c, shared.url, shared.missing, shared.err = startCluster()
		}
	}
	if shared.err != nil {
		if shared.missing && os.Getenv("CI") != "true" {
			tb.Skipf("pgtest: no PostgreSQL: set %s or install PostgreSQL (%v)", EnvURL, shared.err)
		}
		tb.Fatalf("pgtest: no PostgreSQL for the test: %v", shared.err)
	}
	return shared.url
}

// withSearchPath adds search_path=schema to a URL or keyword/value string.
func withSearchPath(tb testing.TB, base, schema string) string {
	tb.Helper()
	if !strings.HasPrefix(base, "postgres://") && !strings.HasPrefix(base, "postgresql://") {
		return base + " search_path=" + schema
	}
	u, err := url.Parse(base)
	if err != nil {
		tb.Fatalf("pgtest: parse %s: %v", EnvURL, err)
	}
	q := u.Query()
	q.Set("search_path", schema)
	u.RawQuery = q.Encode()
	return u.String()
}

func randomSuffix(tb testing.TB) string {
	var b [6]byte
	if _, err := rand.Read(b[:]); err != nil {
		tb.Fatalf("pgtest: random schema name: %v", err)
	}
	return hex.EncodeToString(b[:])
}

// redact hides a password in a URL for messages.
func redact(s string) string {
	u, err := url.Parse(s)
	if err != nil || u.User == nil {
		return s
	}
	if _, ok := u.User.Password(); ok {
		u.User = url.UserPassword(u.User.Username(), "xxxxx")
	}
	return u.String()
}

// cluster is a running throwaway PostgreSQL server.
type cluster struct {
	dir  string
	cmd  *exec.Cmd
	done chan error // receives the server's exit
}

// startCluster creates and starts a cluster. missing reports that no
// PostgreSQL binaries were found, which is a reason to skip, not to fail.
func startCluster() (c *cluster, base string, missing bool, err error) {
	bin, err := findBinaries()
	if err != nil {
		return nil, "", true, err
	}
	cred, err := serverCredential()
	if err != nil {
		return nil, "", false, err
	}
	dir, err := os.MkdirTemp("", "classwatch-pgtest-")
	if err != nil {
		return nil, "", false, fmt.Errorf("make cluster directory: %w", err)
	}
	fail := func(err error) (*cluster, string, bool, error) {
		os.RemoveAll(dir)
		return nil, "", false, err
	}
	if cred != nil {
		if err := os.Chown(dir, int(cred.Uid), int(cred.Gid)); err != nil {
			return fail(fmt.Errorf("hand cluster directory to the postgres user: %w", err))
		}
	}
	data := filepath.Join(dir, "data")
	initdb := exec.Command(filepath.Join(bin, "initdb"), "-D", data, "-U", "postgres",
		"--auth=trust", "--encoding=UTF8", "--locale=C", "--no-sync")
	initdb.SysProcAttr = &syscall.SysProcAttr{Credential: cred}
	initdb.Dir = dir
	if out, err := initdb.CombinedOutput(); err != nil {
		return fail(fmt.Errorf("initdb: %w: %s", err, out))
	}
	port, err := freePort()
	if err != nil {
		return fail(err)
	}
	logf, err := os.Create(filepath.Join(dir, "server.log"))
	if err != nil {
		return fail(fmt.Errorf("create server log: %w", err))
	}
	defer logf.Close()
	// The server is a direct child that the kernel kills if this process
	// dies first (Pdeathsig), so a crashed test run leaves no server
	// behind. Durability settings are off: the cluster is thrown away.
	cmd := exec.Command(filepath.Join(bin, "postgres"), "-D", data,
		"-p", strconv.Itoa(port), "-k", dir,
		"-c", "listen_addresses=127.0.0.1",
		"-c", "fsync=off", "-c", "synchronous_commit=off", "-c", "full_page_writes=off",
		"-c", "max_connections=200")
	cmd.SysProcAttr = &syscall.SysProcAttr{Credential: cred, Pdeathsig: syscall.SIGKILL}
	cmd.Dir = dir
	cmd.Stdout, cmd.Stderr = logf, logf
	if err := cmd.Start(); err != nil {
		return fail(fmt.Errorf("start postgres: %w", err))
	}
	c = &cluster{dir: dir, cmd: cmd, done: make(chan error, 1)}
	go func() { c.done <- cmd.Wait() }()
	base = fmt.Sprintf("postgres://postgres@127.0.0.1:%d/postgres?sslmode=disable", port)
	if err := c.waitReady(base); err != nil {
		log, _ := os.ReadFile(filepath.Join(dir, "server.log"))
		return fail(errors.Join(fmt.Errorf("%w; server log:\n%s", err, log), c.stop()))
	}
	return c, base, false, nil
}

// waitReady polls until the server accepts connections.
func (c *cluster) waitReady(base string) error {
	deadline := time.Now().Add(60 * time.Second)
	for {
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
		conn, err := pgx.Connect(ctx, base)
		if err == nil {
			err = conn.Ping(ctx)
			conn.Close(ctx)
		}
		cancel()
		if err == nil {
			return nil
		}
		select {
		case werr := <-c.done:
			c.done <- werr
			return fmt.Errorf("postgres exited at start: %v", werr)
		case <-time.After(100 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("postgres did not accept connections within a minute: %w", err)
		}
	}
}

// stop shuts the server down (fast shutdown, then kill) and removes its
// directory.
func (c *cluster) stop() error {
	var err error
	if c.cmd.Process != nil {
		_ = c.cmd.Process.Signal(syscall.SIGINT)
		select {
		case <-c.done:
		case <-time.After(20 * time.Second):
			err = c.cmd.Process.Kill()
			<-c.done
		}
	}
	return errors.Join(err, os.RemoveAll(c.dir))
}

// findBinaries returns a directory holding initdb and postgres: the one
// initdb in PATH resolves to, else the newest /usr/lib/postgresql/*/bin.
func findBinaries() (string, error) {
	has := func(dir string) bool {
		for _, name := range []string{"initdb", "postgres"} {
			if _, err := os.Stat(filepath.Join(dir, name)); err != nil {
				return false
			}
		}
		return true
	}
	if p, err := exec.LookPath("initdb"); err == nil {
		if real, err := filepath.EvalSymlinks(p); err == nil && has(filepath.Dir(real)) {
			return filepath.Dir(real), nil
		}
		if has(filepath.Dir(p)) {
			return filepath.Dir(p), nil
		}
	}
	dirs, _ := filepath.Glob("/usr/lib/postgresql/*/bin")
	sort.Slice(dirs, func(i, j int) bool { return version(dirs[i]) > version(dirs[j]) })
	for _, d := range dirs {
		if has(d) {
			return d, nil
		}
	}
	return "", errors.New("initdb and postgres not found in PATH or /usr/lib/postgresql/*/bin")
}

// version reads the major version from /usr/lib/postgresql/N/bin.
func version(dir string) int {
	n, _ := strconv.Atoi(filepath.Base(filepath.Dir(dir)))
	return n
}

// serverCredential returns the unprivileged user the server runs as when
// this process is root, nil otherwise.
func serverCredential() (*syscall.Credential, error) {
	if os.Geteuid() != 0 {
		return nil, nil
	}
	u, err := user.Lookup("postgres")
	if err != nil {
		return nil, fmt.Errorf("running as root, PostgreSQL needs an unprivileged user: %w", err)
	}
	uid, err1 := strconv.ParseUint(u.Uid, 10, 32)
	gid, err2 := strconv.ParseUint(u.Gid, 10, 32)
	if err := errors.Join(err1, err2); err != nil {
		return nil, fmt.Errorf("read postgres user ids: %w", err)
	}
	return &syscall.Credential{Uid: uint32(uid), Gid: uint32(gid)}, nil
}

// freePort asks the kernel for an unused TCP port on the loopback address.
func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}
