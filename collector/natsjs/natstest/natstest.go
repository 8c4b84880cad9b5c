// Package natstest starts a private nats-server with JetStream for a test.
//
// Start runs the nats-server binary from PATH (or /usr/sbin) on a free
// loopback port with its JetStream store in the test's temporary directory,
// and stops it when the test ends. It never uses a server that happens to
// run on the machine's usual port, so tests cannot disturb one another or a
// real deployment. Without the binary the test is skipped, except under CI
// (CI=true), where a missing nats-server fails it: CI must not pass by
// testing nothing.
package natstest

import (
	"bytes"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"sync"
	"syscall"
	"testing"
	"time"
)

// Server is a running nats-server.
type Server struct {
	// URL is the client URL, nats://127.0.0.1:PORT.
	URL string

	bin  string
	port int
	dir  string
	tb   testing.TB

	mu     sync.Mutex
	cmd    *exec.Cmd
	exited chan struct{}
	logs   *bytes.Buffer
}

// binary finds nats-server.
func binary() (string, error) {
	if p, err := exec.LookPath("nats-server"); err == nil {
		return p, nil
	}
	for _, p := range []string{"/usr/sbin/nats-server", "/usr/local/bin/nats-server"} {
		if _, err := os.Stat(p); err == nil {
			return p, nil
		}
	}
	return "", errors.New("nats-server is not installed (Debian package nats-server)")
}

// Start starts a server with JetStream for tb and stops it when tb ends.
func Start(tb testing.TB) *Server {
	tb.Helper()
	bin, err := binary()
	if err != nil {
		if os.Getenv("CI") == "true" {
			tb.Fatalf("natstest: %v", err)
		}
		tb.Skipf("natstest: %v", err)
	}
	s := &Server{bin: bin, dir: tb.TempDir(), tb: tb}
	var lastErr error
	for range 5 {
		if s.port, err = freePort(); err != nil {
			tb.Fatalf("natstest: %v", err)
		}
		if lastErr = s.start(); lastErr == nil {
			break
		}
	}
	if lastErr != nil {
		tb.Fatalf("natstest: %v", lastErr)
	}
	s.URL = fmt.Sprintf("nats://127.0.0.1:%d", s.port)
	tb.Cleanup(func() { s.Stop() })
	return s
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// start runs the server and waits until it accepts connections.
func (s *Server) start() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	logs := &bytes.Buffer{}
	cmd := exec.Command(s.bin, "-js", "-a", "127.0.0.1", "-p", strconv.Itoa(s.port),
		"-sd", filepath.Join(s.dir, "jetstream"), "-n", "classwatch-test")
	cmd.Stdout, cmd.Stderr = logs, logs
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	if err := cmd.Start(); err != nil {
		return fmt.Errorf("start nats-server: %w", err)
	}
	exited := make(chan struct{})
	go func() { _ = cmd.Wait(); close(exited) }()
	deadline := time.Now().Add(10 * time.Second)
	for time.Now().Before(deadline) {
		select {
		case <-exited:
			return fmt.Errorf("nats-server exited at start: %s", logs.String())
		default:
		}
		if c, err := net.DialTimeout("tcp", fmt.Sprintf("127.0.0.1:%d", s.port), 200*time.Millisecond); err == nil {
			c.Close()
			s.cmd, s.exited, s.logs = cmd, exited, logs
			return nil
		}
		time.Sleep(20 * time.Millisecond)
	}
	_ = cmd.Process.Kill()
	<-exited
	return fmt.Errorf("nats-server did not listen within 10s: %s", logs.String())
}

// Stop stops the server; its JetStream store stays for Restart.
func (s *Server) Stop() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd == nil {
		return
	}
	_ = s.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-s.exited:
	case <-time.After(10 * time.Second):
		_ = s.cmd.Process.Kill()
		<-s.exited
	}
	s.cmd = nil
}

// Restart starts the server again on the same port and store.
func (s *Server) Restart() {
	s.tb.Helper()
	if err := s.start(); err != nil {
		s.tb.Fatalf("natstest: restart: %v", err)
	}
}

// Logs returns what the server printed so far.
func (s *Server) Logs() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.logs == nil {
		return ""
	}
	return s.logs.String()
}
