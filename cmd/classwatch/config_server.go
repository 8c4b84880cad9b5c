package main

import (
	"fmt"
	"net"
	"time"
)

// defaultStoreWait is how long serve keeps trying to reach the store at
// start before it gives up.
const defaultStoreWait = 2 * time.Minute

// tlsConfig names the server's certificate chain and private key, PEM
// files. With both set the daemon serves HTTPS only; it reads them again on
// SIGHUP and when either file changes.
type tlsConfig struct {
	CertFile string `yaml:"cert_file,omitempty"`
	KeyFile  string `yaml:"key_file,omitempty"`
}

// enabled reports whether HTTPS is configured.
func (t tlsConfig) enabled() bool { return t.CertFile != "" || t.KeyFile != "" }

// readConfig guards the read side: the read API, the pages and /metrics.
// With no token every reader may read; /healthz and /readyz stay open.
type readConfig struct {
	Tokens []tokenConfig `yaml:"tokens,omitempty"`
}

// validateServer checks the TLS, read-token and start-up keys.
func (c config) validateServer(p *problems, secrets bool) {
	if c.TLS.enabled() && (c.TLS.CertFile == "" || c.TLS.KeyFile == "") {
		p.add("tls", "needs both cert_file and key_file")
	}
	if c.StoreWait < 0 {
		p.add("store_wait", "must not be negative (0 gives up at the first failure)")
	}
	checkTokens(p, "read.tokens", c.Read.Tokens, secrets)
	for i, t := range c.Read.Tokens {
		if len(t.Models) > 0 {
			p.add(fmt.Sprintf("read.tokens[%d].models", i), "read tokens may read every model; leave the key out")
		}
	}
}

// loopbackOnly reports whether listen binds only loopback addresses, so
// that nothing outside the host can reach the daemon.
func loopbackOnly(listen string) bool {
	host, _, err := net.SplitHostPort(listen)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}
