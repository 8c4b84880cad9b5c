package main

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"log/slog"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"syscall"
	"testing"
	"time"
)

// writeCert writes a fresh self-signed certificate for 127.0.0.1 with the
// given common name to certFile and keyFile, and returns it.
func writeCert(t *testing.T, name, certFile, keyFile string) *x509.Certificate {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(time.Now().UnixNano()),
		Subject:      pkix.Name{CommonName: name},
		NotBefore:    time.Now().Add(-time.Hour),
		NotAfter:     time.Now().Add(time.Hour),
		IPAddresses:  []net.IP{net.ParseIP("127.0.0.1")},
		KeyUsage:     x509.KeyUsageDigitalSignature,
		ExtKeyUsage:  []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	keyDER, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: keyDER}), 0o600); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatal(err)
	}
	return cert
}

// servedName connects to addr and returns the common name of the
// certificate the server presents (verification is the caller's concern:
// the test trusts every certificate it wrote).
func servedName(t *testing.T, client *http.Client, url string) string {
	t.Helper()
	resp, err := client.Get(url + "/healthz")
	if err != nil {
		t.Fatalf("GET %s/healthz: %v", url, err)
	}
	resp.Body.Close()
	return resp.TLS.PeerCertificates[0].Subject.CommonName
}

// TestTLSReloadOnSIGHUP serves HTTPS with one certificate, replaces the
// files and signals SIGHUP: new connections get the new certificate.
func TestTLSReloadOnSIGHUP(t *testing.T) {
	dir := t.TempDir()
	certFile, keyFile := filepath.Join(dir, "tls.crt"), filepath.Join(dir, "tls.key")
	pool := x509.NewCertPool()
	pool.AddCert(writeCert(t, "cert-one", certFile, keyFile))
	cfg := testConfig(t, "tls: {cert_file: "+certFile+", key_file: "+keyFile+"}\n", "", nil)

	p := launchInProcess(t, cfg)
	hup := make(chan os.Signal, 1)
	p.d.hup = hup
	if err := p.d.start(context.Background()); err != nil {
		t.Fatal(err)
	}
	p.serve()
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}, DisableKeepAlives: true}}
	if got := servedName(t, client, p.url); got != "cert-one" {
		t.Fatalf("served %q, want cert-one", got)
	}
	if resp, err := http.Get("http://" + p.d.addr() + "/healthz"); err == nil {
		resp.Body.Close()
		if resp.StatusCode == http.StatusOK {
			t.Error("plain HTTP answered 200 on the HTTPS listener")
		}
	}

	pool.AddCert(writeCert(t, "cert-two", certFile, keyFile))
	hup <- syscall.SIGHUP
	deadline := time.Now().Add(5 * time.Second)
	for servedName(t, client, p.url) != "cert-two" {
		if time.Now().After(deadline) {
			t.Fatal("still serving cert-one 5s after SIGHUP")
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// TestTLSReloadOnChange checks that the reloader picks up changed files by
// itself, and keeps the certificate in use when the new files are broken.
func TestTLSReloadOnChange(t *testing.T) {
	dir := t.TempDir()
	certFile, keyFile := filepath.Join(dir, "tls.crt"), filepath.Join(dir, "tls.key")
	writeCert(t, "cert-one", certFile, keyFile)
	r, err := newCertReloader(certFile, keyFile, slog.New(slog.DiscardHandler))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go r.watch(ctx, nil, 10*time.Millisecond)
	name := func() string {
		c, _ := r.getCertificate(nil)
		leaf, err := x509.ParseCertificate(c.Certificate[0])
		if err != nil {
			t.Fatal(err)
		}
		return leaf.Subject.CommonName
	}
	waitFor := func(want string) {
		t.Helper()
		deadline := time.Now().Add(5 * time.Second)
		for name() != want {
			if time.Now().After(deadline) {
				t.Fatalf("serving %q, want %q", name(), want)
			}
			time.Sleep(10 * time.Millisecond)
		}
	}
	writeCert(t, "cert-two", certFile, keyFile)
	waitFor("cert-two")
	// A half-written renewal: the key no longer matches.
	if err := os.WriteFile(keyFile, []byte("not a key"), 0o600); err != nil {
		t.Fatal(err)
	}
	time.Sleep(100 * time.Millisecond)
	if got := name(); got != "cert-two" {
		t.Errorf("after a broken renewal serving %q, want cert-two kept", got)
	}
	if _, err := newCertReloader(certFile, keyFile, slog.New(slog.DiscardHandler)); err == nil {
		t.Error("a broken pair loads at start")
	}
}
