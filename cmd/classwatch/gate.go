package main

import (
	"crypto/subtle"
	"encoding/json"
	"net/http"
	"strconv"
	"strings"
	"sync/atomic"
	"time"
)

// gate is the daemon's root handler, in front of every route:
//
//   - /healthz and /readyz are always open. While the daemon starts, /readyz
//     answers 503 with the reason and every other route 503 with
//     Retry-After; afterwards /readyz answers 503 while the store cannot
//     commit, and otherwise the read API's own check answers.
//   - With read tokens configured, every route except the two ingest
//     endpoints (which check their own tokens) needs one of them, as a
//     bearer token or as the password of HTTP basic authentication (what a
//     browser asks for).
type gate struct {
	routes     atomic.Pointer[http.ServeMux] // nil while starting
	starting   atomic.Pointer[string]        // why not ready while starting
	health     *storeHealth
	readTokens [][]byte
	retryAfter string
}

// newGate returns a gate in the starting state.
func newGate(health *storeHealth, readTokens []tokenConfig, retryAfter time.Duration) *gate {
	g := &gate{health: health, retryAfter: formatSeconds(retryAfter)}
	for _, t := range readTokens {
		g.readTokens = append(g.readTokens, []byte(t.secret))
	}
	g.setStarting("starting")
	return g
}

// setStarting records why the daemon is not serving yet.
func (g *gate) setStarting(reason string) { g.starting.Store(&reason) }

// open hands every request to routes from now on.
func (g *gate) open(routes *http.ServeMux) { g.routes.Store(routes) }

// ServeHTTP routes one request through the gate.
func (g *gate) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	routes := g.routes.Load()
	switch r.URL.Path {
	case "/healthz":
		if routes == nil {
			writeGateJSON(w, http.StatusOK, map[string]string{"status": "alive"})
			return
		}
	case "/readyz":
		if reason := g.notReady(routes); reason != "" {
			writeGateJSON(w, http.StatusServiceUnavailable, map[string]string{"status": "not ready", "reason": reason})
			return
		}
	default:
		if routes == nil {
			w.Header().Set("Retry-After", g.retryAfter)
			writeGateJSON(w, http.StatusServiceUnavailable, map[string]string{"error": "starting: " + *g.starting.Load()})
			return
		}
		if !g.mayRead(r) {
			w.Header().Set("WWW-Authenticate", `Bearer realm="classwatch", Basic realm="classwatch"`)
			writeGateJSON(w, http.StatusUnauthorized, map[string]string{"error": "missing or invalid read token"})
			return
		}
	}
	routes.ServeHTTP(w, r)
}

// notReady returns why /readyz must answer 503, or "" to let the read
// API's check answer.
func (g *gate) notReady(routes *http.ServeMux) string {
	if routes == nil {
		return *g.starting.Load()
	}
	return g.health.failing()
}

// mayRead reports whether r may reach its route: an ingest request (the
// collector checks its tokens), or any request when no read token is
// configured, or one carrying a read token.
func (g *gate) mayRead(r *http.Request) bool {
	if len(g.readTokens) == 0 {
		return true
	}
	if r.Method == http.MethodPost && (r.URL.Path == "/v1/predictions" || r.URL.Path == "/v1/labels") {
		return true
	}
	var given string
	if tok, ok := strings.CutPrefix(r.Header.Get("Authorization"), "Bearer "); ok {
		given = strings.TrimSpace(tok)
	} else if _, pass, ok := r.BasicAuth(); ok {
		given = pass
	}
	if given == "" {
		return false
	}
	found := 0
	for _, t := range g.readTokens {
		found |= subtle.ConstantTimeCompare([]byte(given), t)
	}
	return found == 1
}

// writeGateJSON answers with a JSON body.
func writeGateJSON(w http.ResponseWriter, code int, v any) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	_ = json.NewEncoder(w).Encode(v)
}

// formatSeconds renders a Retry-After value: whole seconds, at least 1.
func formatSeconds(d time.Duration) string {
	s := int64((d + time.Second - 1) / time.Second)
	return strconv.FormatInt(max(s, 1), 10)
}
