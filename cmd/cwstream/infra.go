package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5"
)

// createDatabase makes cwstream_<random> on the server of adminURL and
// returns its URL and a function that drops it.
func createDatabase(ctx context.Context, adminURL string) (string, func() error, error) {
	u, err := url.Parse(adminURL)
	if err != nil {
		return "", nil, fmt.Errorf("parse database URL: %w", err)
	}
	name := fmt.Sprintf("cwstream_%08x", rand.Uint32())
	c, err := pgx.Connect(ctx, adminURL)
	if err != nil {
		return "", nil, fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(context.WithoutCancel(ctx))
	if _, err := c.Exec(ctx, "CREATE DATABASE "+name); err != nil {
		return "", nil, fmt.Errorf("create database: %w", err)
	}
	drop := func() error {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		defer cancel()
		c, err := pgx.Connect(ctx, adminURL)
		if err != nil {
			return fmt.Errorf("connect to postgres: %w", err)
		}
		defer c.Close(ctx)
		_, err = c.Exec(ctx, "DROP DATABASE IF EXISTS "+name+" WITH (FORCE)")
		return err
	}
	u.Path = "/" + name
	return u.String(), drop, nil
}

// analyze refreshes the planner statistics of the database at dbURL.
func analyze(ctx context.Context, dbURL string) error {
	c, err := pgx.Connect(ctx, dbURL)
	if err != nil {
		return fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(context.WithoutCancel(ctx))
	if _, err := c.Exec(ctx, "ANALYZE"); err != nil {
		return fmt.Errorf("analyze: %w", err)
	}
	return nil
}

// startNATS runs a private nats-server with JetStream under dir and
// returns its URL and a function that stops it.
func startNATS(ctx context.Context, dir string) (string, func(), error) {
	bin, err := exec.LookPath("nats-server")
	if err != nil {
		bin = "/usr/sbin/nats-server"
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return "", nil, err
	}
	port := l.Addr().(*net.TCPAddr).Port
	l.Close()
	logf, err := os.Create(filepath.Join(dir, "nats-server.log"))
	if err != nil {
		return "", nil, err
	}
	cmd := exec.Command(bin, "-js", "-a", "127.0.0.1", "-p", strconv.Itoa(port), "-sd", filepath.Join(dir, "jetstream"))
	cmd.Stdout, cmd.Stderr = logf, logf
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGTERM}
	if err := cmd.Start(); err != nil {
		logf.Close()
		return "", nil, fmt.Errorf("start nats-server (Debian package nats-server, or pass --nats-url): %w", err)
	}
	stop := func() { _ = cmd.Process.Signal(syscall.SIGTERM); _ = cmd.Wait(); logf.Close() }
	addr := fmt.Sprintf("127.0.0.1:%d", port)
	for deadline := time.Now().Add(10 * time.Second); time.Now().Before(deadline); time.Sleep(20 * time.Millisecond) {
		if c, err := net.Dial("tcp", addr); err == nil {
			c.Close()
			return "nats://" + addr, stop, nil
		}
		if ctx.Err() != nil {
			break
		}
	}
	stop()
	return "", nil, errors.New("nats-server did not listen within 10s")
}

// get fetches a URL and decodes JSON into v when v is not nil.
func get(ctx context.Context, target string, v any) (int, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, target, nil)
	if err != nil {
		return 0, err
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	if v == nil {
		_, err = io.Copy(io.Discard, resp.Body)
		return resp.StatusCode, err
	}
	return resp.StatusCode, json.NewDecoder(resp.Body).Decode(v)
}
