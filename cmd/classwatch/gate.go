package main

import (
	"crypto/subtle"
	"encoding/json"
	"io"
	"net/http"
	"strconv"
	"strings"
	"sync"
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
//   - It tracks request bodies still being received, so that shutdown can
//     cut stalled senders first.
type gate struct {
	routes     atomic.Pointer[http.ServeMux] // nil while starting
	starting   atomic.Pointer[string]        // why not ready while starting
	health     *storeHealth
	readTokens [][]byte
	retryAfter string

	mu     sync.Mutex
	bodies map[*trackedBody]*http.ResponseController
}

// newGate returns a gate in the starting state.
func newGate(health *storeHealth, readTokens []tokenConfig, retryAfter time.Duration) *gate {
	g := &gate{health: health, retryAfter: formatSeconds(retryAfter), bodies: map[*trackedBody]*http.ResponseController{}}
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
	defer g.track(w, r)()
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

// trackedBody is a request body that notes when it has been read to the
// end (or failed).
type trackedBody struct {
	io.ReadCloser
	done atomic.Bool
}

// Read reads from the body and notes its end.
func (b *trackedBody) Read(p []byte) (int, error) {
	n, err := b.ReadCloser.Read(p)
	if err != nil {
		b.done.Store(true)
	}
	return n, err
}

// track registers r's body, if it has one, until the returned function
// runs.
func (g *gate) track(w http.ResponseWriter, r *http.Request) func() {
	if r.Body == nil || r.Body == http.NoBody {
		return func() {}
	}
	b := &trackedBody{ReadCloser: r.Body}
	r.Body = b
	g.mu.Lock()
	g.bodies[b] = http.NewResponseController(w)
	g.mu.Unlock()
	return func() {
		g.mu.Lock()
		delete(g.bodies, b)
		g.mu.Unlock()
	}
}

// receiving counts the request bodies not yet read to the end.
func (g *gate) receiving() int {
	g.mu.Lock()
	defer g.mu.Unlock()
	n := 0
	for b := range g.bodies {
		if !b.done.Load() {
			n++
		}
	}
	return n
}

// cutBodies ends the reads of every request body not yet received: their
// connections' read deadlines pass now, so the handlers see an error and
// answer. It returns how many it cut.
func (g *gate) cutBodies() int {
	g.mu.Lock()
	defer g.mu.Unlock()
	n := 0
	for b, rc := range g.bodies {
		if !b.done.Load() {
			_ = rc.SetReadDeadline(time.Now())
			n++
		}
	}
	return n
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
