package main

import (
	"context"
	"crypto/tls"
	"fmt"
	"log/slog"
	"os"
	"sync"
	"time"
)

// certCheckInterval is how often the certificate files are checked for
// changes.
const certCheckInterval = 10 * time.Second

// certReloader holds the server's certificate and reads it again when asked
// (SIGHUP) or when the files change. A failed reload keeps the certificate
// in use and logs why, so a half-written renewal never takes HTTPS down.
type certReloader struct {
	certFile, keyFile string
	log               *slog.Logger

	mu    sync.RWMutex
	cert  *tls.Certificate
	stamp string // size and modification time of both files at the last reload
}

// newCertReloader loads the pair once; an unreadable or mismatched pair is
// an error naming the files.
func newCertReloader(certFile, keyFile string, log *slog.Logger) (*certReloader, error) {
	r := &certReloader{certFile: certFile, keyFile: keyFile, log: log}
	if err := r.reload(); err != nil {
		return nil, err
	}
	return r, nil
}

// fileStamp describes the two files' sizes and modification times.
func (r *certReloader) fileStamp() string {
	var s string
	for _, f := range []string{r.certFile, r.keyFile} {
		if fi, err := os.Stat(f); err == nil {
			s += fmt.Sprintf("%d@%d;", fi.Size(), fi.ModTime().UnixNano())
		} else {
			s += "missing;"
		}
	}
	return s
}

// reload reads both files and, when they form a valid pair, uses them from
// the next handshake on.
func (r *certReloader) reload() error {
	stamp := r.fileStamp()
	cert, err := tls.LoadX509KeyPair(r.certFile, r.keyFile)
	r.mu.Lock()
	defer r.mu.Unlock()
	r.stamp = stamp
	if err != nil {
		return fmt.Errorf("load TLS certificate %s and key %s: %w", r.certFile, r.keyFile, err)
	}
	r.cert = &cert
	return nil
}

// changed reports whether the files differ from the last reload's.
func (r *certReloader) changed() bool {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return r.fileStamp() != r.stamp
}

// getCertificate is tls.Config.GetCertificate.
func (r *certReloader) getCertificate(*tls.ClientHelloInfo) (*tls.Certificate, error) {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return r.cert, nil
}

// tlsConfig returns the server's TLS settings over the reloader.
func (r *certReloader) tlsConfig() *tls.Config {
	return &tls.Config{MinVersion: tls.VersionTLS12, GetCertificate: r.getCertificate}
}

// watch reloads on every value from hup and whenever the files change,
// until ctx ends.
func (r *certReloader) watch(ctx context.Context, hup <-chan os.Signal, every time.Duration) {
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		why := ""
		select {
		case <-ctx.Done():
			return
		case <-hup:
			why = "SIGHUP"
		case <-t.C:
			if !r.changed() {
				continue
			}
			why = "files changed"
		}
		if err := r.reload(); err != nil {
			r.log.Error("TLS certificate not reloaded; keeping the one in use", "trigger", why, "err", err)
			continue
		}
		r.log.Info("TLS certificate reloaded", "trigger", why, "cert_file", r.certFile)
	}
}
