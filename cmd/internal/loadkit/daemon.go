package loadkit

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"time"
)

// daemonPackage is the import path of the daemon's main package. Building
// by import path works from any directory inside the module.
const daemonPackage = "github.com/classwatch/classwatch/cmd/classwatch"

// Bounds on the daemon's start and stop.
const (
	startTimeout = time.Minute
	stopTimeout  = 30 * time.Second
)

// BuildDaemon builds the daemon into dir and returns the binary's path.
func BuildDaemon(ctx context.Context, dir string) (string, error) {
	goBin, err := exec.LookPath("go")
	if err != nil {
		return "", fmt.Errorf("find the go command to build the daemon (or pass --binary): %w", err)
	}
	out := filepath.Join(dir, "classwatch")
	cmd := exec.CommandContext(ctx, goBin, "build", "-o", out, daemonPackage)
	var msg bytes.Buffer
	cmd.Stdout, cmd.Stderr = &msg, &msg
	if err := cmd.Run(); err != nil {
		return "", fmt.Errorf("build daemon (or pass --binary): %w\n%s", err, msg.Bytes())
	}
	return out, nil
}

// Daemon is a classwatch daemon running as a child process.
type Daemon struct {
	// PID is the daemon's process id.
	PID int
	// Base is its address, "http://127.0.0.1:port".
	Base string

	cmd     *exec.Cmd
	logPath string
	exited  chan struct{}
	waitErr error // set before exited is closed
	stopped bool
}

// StartDaemon runs "binary serve" with the config file and the extra
// arguments on a free loopback port, logging to logPath, and waits until
// /readyz answers 200.
func StartDaemon(ctx context.Context, binary, configPath, logPath string, extra ...string) (*Daemon, error) {
	logf, err := os.Create(logPath)
	if err != nil {
		return nil, fmt.Errorf("create daemon log: %w", err)
	}
	pr, pw, err := os.Pipe()
	if err != nil {
		logf.Close()
		return nil, fmt.Errorf("create pipe: %w", err)
	}
	args := append([]string{"serve", "--config", configPath, "--listen", "127.0.0.1:0"}, extra...)
	cmd := exec.Command(binary, args...)
	cmd.Stdout, cmd.Stderr = pw, logf
	// Should the tool die without stopping it, the daemon gets SIGTERM.
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGTERM}
	if err := cmd.Start(); err != nil {
		pr.Close()
		pw.Close()
		logf.Close()
		return nil, fmt.Errorf("start daemon: %w", err)
	}
	pw.Close()
	d := &Daemon{cmd: cmd, PID: cmd.Process.Pid, logPath: logPath, exited: make(chan struct{})}
	go func() {
		d.waitErr = cmd.Wait()
		logf.Close()
		close(d.exited)
	}()

	// The first stdout line names the address; the rest goes to the log.
	addr := make(chan string, 1)
	go func() {
		defer pr.Close()
		r := bufio.NewReader(pr)
		line, _ := r.ReadString('\n')
		if a, ok := strings.CutPrefix(strings.TrimSpace(line), "classwatch listening on "); ok {
			addr <- strings.TrimSuffix(a, "/")
		}
		_, _ = io.Copy(io.Discard, r)
	}()
	if err := d.waitReady(ctx, addr); err != nil {
		return nil, err
	}
	return d, nil
}

// waitReady waits for the address, then for /readyz to answer 200; on
// failure it stops the daemon and adds the end of its log to the error.
func (d *Daemon) waitReady(ctx context.Context, addr <-chan string) error {
	timer := time.NewTimer(startTimeout)
	defer timer.Stop()
	fail := func(err error) error {
		return errors.Join(err, d.Stop(), d.LogTail())
	}
	select {
	case d.Base = <-addr:
	case <-d.exited:
		return fail(fmt.Errorf("daemon exited at start: %v", d.waitErr))
	case <-timer.C:
		return fail(errors.New("daemon did not print its address within a minute"))
	case <-ctx.Done():
		return fail(ctx.Err())
	}
	if !strings.HasPrefix(d.Base, "http://127.0.0.1:") {
		return fail(fmt.Errorf("daemon listens on %s, not on loopback", d.Base))
	}
	for {
		if ready(ctx, d.Base) {
			return nil
		}
		select {
		case <-d.exited:
			return fail(fmt.Errorf("daemon exited at start: %v", d.waitErr))
		case <-timer.C:
			return fail(errors.New("daemon was not ready within a minute"))
		case <-ctx.Done():
			return fail(ctx.Err())
		case <-time.After(50 * time.Millisecond):
		}
	}
}

func ready(ctx context.Context, base string) bool {
	ctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, base+"/readyz", nil)
	if err != nil {
		return false
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return false
	}
	resp.Body.Close()
	return resp.StatusCode == http.StatusOK
}

// Stop sends SIGTERM, waits for the daemon's orderly shutdown (killing it
// after stopTimeout) and reports an unclean exit. A second call is a no-op.
func (d *Daemon) Stop() error {
	if d.stopped {
		return nil
	}
	d.stopped = true
	select {
	case <-d.exited:
		return d.exitError()
	default:
	}
	if err := d.cmd.Process.Signal(syscall.SIGTERM); err != nil && !errors.Is(err, os.ErrProcessDone) {
		return fmt.Errorf("signal daemon: %w", err)
	}
	select {
	case <-d.exited:
		return d.exitError()
	case <-time.After(stopTimeout):
		_ = d.cmd.Process.Kill()
		<-d.exited
		return fmt.Errorf("daemon did not stop within %s after SIGTERM; killed", stopTimeout)
	}
}

func (d *Daemon) exitError() error {
	if d.waitErr != nil {
		return fmt.Errorf("daemon exit: %w", d.waitErr)
	}
	return nil
}

// LogTail returns the end of the daemon's log as an error, to explain a
// failure; nil when the log is empty.
func (d *Daemon) LogTail() error {
	data, err := os.ReadFile(d.logPath)
	if err != nil || len(bytes.TrimSpace(data)) == 0 {
		return nil
	}
	lines := strings.Split(strings.TrimSpace(string(data)), "\n")
	lines = lines[max(0, len(lines)-15):]
	return fmt.Errorf("daemon log (%s) ends:\n%s", d.logPath, strings.Join(lines, "\n"))
}
