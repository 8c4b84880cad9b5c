package pgtest

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"syscall"
	"testing"
	"time"
)

// Cluster is a private PostgreSQL server that a test may stop and start
// again, for fault injection. Unlike the server behind URL, nothing else
// uses it. NewCluster skips or fails as URL does when PostgreSQL is
// missing; the cluster is removed when the test ends.
type Cluster struct {
	bin, dir string
	port     int
	cred     *syscall.Credential
	c        *cluster // the running server, nil while stopped
}

// NewCluster creates a cluster in a temporary directory (initdb) and
// starts it on a free loopback port.
func NewCluster(tb testing.TB) *Cluster {
	tb.Helper()
	bin, err := findBinaries()
	if err != nil {
		if os.Getenv("CI") != "true" {
			tb.Skipf("pgtest: no PostgreSQL binaries for a private cluster: %v", err)
		}
		tb.Fatalf("pgtest: %v", err)
	}
	cred, err := serverCredential()
	if err != nil {
		tb.Fatalf("pgtest: %v", err)
	}
	dir, err := os.MkdirTemp("", "classwatch-pgcluster-")
	if err != nil {
		tb.Fatalf("pgtest: make cluster directory: %v", err)
	}
	c := &Cluster{bin: bin, dir: dir, cred: cred}
	tb.Cleanup(func() {
		if c.c != nil {
			_ = c.c.stop() // removes dir
		}
		os.RemoveAll(dir)
	})
	if cred != nil {
		if err := os.Chown(dir, int(cred.Uid), int(cred.Gid)); err != nil {
			tb.Fatalf("pgtest: hand cluster directory to the postgres user: %v", err)
		}
	}
	initdb := exec.Command(filepath.Join(bin, "initdb"), "-D", filepath.Join(dir, "data"), "-U", "postgres",
		"--auth=trust", "--encoding=UTF8", "--locale=C", "--no-sync")
	initdb.SysProcAttr = &syscall.SysProcAttr{Credential: cred}
	initdb.Dir = dir
	if out, err := initdb.CombinedOutput(); err != nil {
		tb.Fatalf("pgtest: initdb: %v: %s", err, out)
	}
	if c.port, err = freePort(); err != nil {
		tb.Fatalf("pgtest: %v", err)
	}
	c.Start(tb)
	return c
}

// URL returns the cluster's connection URL (its postgres database).
func (c *Cluster) URL() string {
	return fmt.Sprintf("postgres://postgres@127.0.0.1:%d/postgres?sslmode=disable", c.port)
}

// Start starts the stopped server again, on the same port and data, and
// waits until it accepts connections.
func (c *Cluster) Start(tb testing.TB) {
	tb.Helper()
	if c.c != nil {
		tb.Fatal("pgtest: cluster already running")
	}
	logf, err := os.OpenFile(filepath.Join(c.dir, "server.log"), os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o644)
	if err != nil {
		tb.Fatalf("pgtest: open server log: %v", err)
	}
	defer logf.Close()
	cmd := exec.Command(filepath.Join(c.bin, "postgres"), "-D", filepath.Join(c.dir, "data"),
		"-p", strconv.Itoa(c.port), "-k", c.dir,
		"-c", "listen_addresses=127.0.0.1", "-c", "max_connections=100")
	cmd.SysProcAttr = &syscall.SysProcAttr{Credential: c.cred, Pdeathsig: syscall.SIGKILL}
	cmd.Dir = c.dir
	cmd.Stdout, cmd.Stderr = logf, logf
	if err := cmd.Start(); err != nil {
		tb.Fatalf("pgtest: start postgres: %v", err)
	}
	running := &cluster{dir: c.dir, cmd: cmd, done: make(chan error, 1)}
	go func() { running.done <- cmd.Wait() }()
	c.c = running
	if err := running.waitReady(c.URL()); err != nil {
		log, _ := os.ReadFile(filepath.Join(c.dir, "server.log"))
		tb.Fatalf("pgtest: %v; server log:\n%s", err, log)
	}
}

// Stop shuts the server down fast (open transactions are rolled back,
// connections closed) and keeps its data for Start.
func (c *Cluster) Stop(tb testing.TB) {
	tb.Helper()
	if c.c == nil {
		tb.Fatal("pgtest: cluster not running")
	}
	_ = c.c.cmd.Process.Signal(syscall.SIGINT)
	select {
	case <-c.c.done:
	case <-time.After(20 * time.Second):
		_ = c.c.cmd.Process.Kill()
		<-c.c.done
	}
	c.c = nil
}
