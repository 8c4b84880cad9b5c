package main

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"net"
	"net/url"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
)

// server is the PostgreSQL server the harness creates its databases on.
type server struct {
	adminURL string
	// created lists the databases made by create and not dropped yet.
	created []string
}

// newServer checks that url is a postgres:// URL of a loopback host or a
// Unix socket: the harness loads the machine hard and must not do that to
// a database elsewhere.
func newServer(adminURL string) (*server, error) {
	u, err := url.Parse(adminURL)
	if err != nil || (u.Scheme != "postgres" && u.Scheme != "postgresql") {
		return nil, fmt.Errorf("database URL must be a postgres:// URL")
	}
	cfg, err := pgconn.ParseConfig(adminURL)
	if err != nil {
		return nil, fmt.Errorf("parse database URL: %w", err)
	}
	hosts := []string{cfg.Host}
	for _, fb := range cfg.Fallbacks {
		hosts = append(hosts, fb.Host)
	}
	for _, h := range hosts {
		if !isLocal(h) {
			return nil, fmt.Errorf("database host %q is not a loopback address or Unix socket", h)
		}
	}
	return &server{adminURL: adminURL}, nil
}

func isLocal(host string) bool {
	if strings.HasPrefix(host, "/") || host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// describe returns the server's version and the settings that decide its
// write speed.
func (s *server) describe(ctx context.Context) (string, error) {
	c, err := pgx.Connect(ctx, s.adminURL)
	if err != nil {
		return "", fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(context.WithoutCancel(ctx))
	var parts []string
	for _, name := range []string{"server_version", "shared_buffers", "synchronous_commit", "fsync", "max_wal_size"} {
		var v string
		if err := c.QueryRow(ctx, "SELECT current_setting($1)", name).Scan(&v); err != nil {
			return "", fmt.Errorf("read setting %s: %w", name, err)
		}
		parts = append(parts, name+"="+v)
	}
	return strings.Join(parts, " "), nil
}

// create makes a fresh database named cwload_<random> and returns its URL.
func (s *server) create(ctx context.Context) (string, error) {
	name := fmt.Sprintf("cwload_%08x", rand.Uint32())
	c, err := pgx.Connect(ctx, s.adminURL)
	if err != nil {
		return "", fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(context.WithoutCancel(ctx))
	if _, err := c.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{name}.Sanitize()); err != nil {
		return "", fmt.Errorf("create database %s: %w", name, err)
	}
	s.created = append(s.created, name)
	u, err := url.Parse(s.adminURL)
	if err != nil {
		return "", fmt.Errorf("parse database URL: %w", err)
	}
	u.Path = "/" + name
	u.RawPath = ""
	return u.String(), nil
}

// dropAll drops every database create made, closing their remaining
// connections. It runs even when ctx was cancelled.
func (s *server) dropAll(ctx context.Context) error {
	if len(s.created) == 0 {
		return nil
	}
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Minute)
	defer cancel()
	c, err := pgx.Connect(ctx, s.adminURL)
	if err != nil {
		return fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(ctx)
	var errs []error
	for _, name := range s.created {
		if _, err := c.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)"); err != nil {
			errs = append(errs, fmt.Errorf("drop database %s: %w", name, err))
		}
	}
	s.created = nil
	return errors.Join(errs...)
}

// backends lists the server processes connected to the databases create
// made, for their CPU time.
func (s *server) backends(ctx context.Context) ([]int, error) {
	c, err := pgx.Connect(ctx, s.adminURL)
	if err != nil {
		return nil, fmt.Errorf("connect to postgres: %w", err)
	}
	defer c.Close(context.WithoutCancel(ctx))
	rows, err := c.Query(ctx, "SELECT pid FROM pg_stat_activity WHERE datname = ANY($1)", s.created)
	if err != nil {
		return nil, fmt.Errorf("list backends: %w", err)
	}
	pids, err := pgx.CollectRows(rows, pgx.RowTo[int32])
	if err != nil {
		return nil, fmt.Errorf("list backends: %w", err)
	}
	out := make([]int, len(pids))
	for i, p := range pids {
		out[i] = int(p)
	}
	return out, nil
}
