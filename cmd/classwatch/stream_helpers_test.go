package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"hash/fnv"
	"io"
	"net"
	"net/http"
	"os"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/classwatch/classwatch/collector/natsjs"
)

// Subjects, stream and consumer of the stream tests.
const (
	testStream   = "CWTEST"
	testDurable  = "cwtest"
	testPredSubj = "cwtest.predictions"
	testLabSubj  = "cwtest.labels"
)

// addSource appends a sources block for the nats server at natsURL to the
// config file at path, with the extra keys given.
func addSource(tb testing.TB, path, natsURL, extra string) {
	tb.Helper()
	block := fmt.Sprintf("sources:\n  - kind: nats\n    url: %s\n    stream: %s\n    predictions_subject: %s\n    labels_subject: %s\n    durable: %s\n",
		natsURL, testStream, testPredSubj, testLabSubj, testDurable)
	for _, kv := range strings.Split(extra, ";") {
		if kv = strings.TrimSpace(kv); kv != "" {
			block += "    " + kv + "\n"
		}
	}
	appendConfig(tb, path, block)
}

// shortQueueWait sets ingest.queue_wait to 1s in the config at path, so
// that a short ack_wait passes validation.
func shortQueueWait(tb testing.TB, path string) {
	tb.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		tb.Fatal(err)
	}
	const from = "ingest: {max_future: 0}"
	if !bytes.Contains(data, []byte(from)) {
		tb.Fatalf("config %s lacks %q", path, from)
	}
	data = bytes.Replace(data, []byte(from), []byte("ingest: {max_future: 0, queue_wait: 1s}"), 1)
	if err := os.WriteFile(path, data, 0o600); err != nil {
		tb.Fatal(err)
	}
}

// appendConfig appends raw YAML to the config file at path.
func appendConfig(tb testing.TB, path, text string) {
	tb.Helper()
	f, err := os.OpenFile(path, os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		tb.Fatal(err)
	}
	defer f.Close()
	if _, err := f.WriteString(text); err != nil {
		tb.Fatal(err)
	}
}

// streamClient publishes to and watches the test stream.
type streamClient struct {
	nc *nats.Conn
	js jetstream.JetStream
}

func newStreamClient(tb testing.TB, natsURL string) *streamClient {
	tb.Helper()
	nc, err := nats.Connect(natsURL)
	if err != nil {
		tb.Fatalf("connect to nats: %v", err)
	}
	tb.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		tb.Fatal(err)
	}
	return &streamClient{nc: nc, js: js}
}

func (c *streamClient) publish(tb testing.TB, subject string, body []byte) {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if _, err := c.js.Publish(ctx, subject, body); err != nil {
		tb.Fatalf("publish to %s: %v", subject, err)
	}
}

// publishGrouped publishes the lines of an NDJSON file in groups of
// messages: the lines of one id share a message and keep their order, so
// "the first one stands" means the same as in the file.
func (c *streamClient) publishGrouped(tb testing.TB, subject, file string, groups int) int {
	tb.Helper()
	data, err := os.ReadFile(file)
	if err != nil {
		tb.Fatal(err)
	}
	bodies := make([][]byte, groups)
	for _, line := range bytes.Split(data, []byte("\n")) {
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		var v struct {
			ID string `json:"id"`
		}
		_ = json.Unmarshal(line, &v) // a bad line goes to group 0
		h := fnv.New32a()
		h.Write([]byte(v.ID))
		g := int(h.Sum32() % uint32(groups))
		bodies[g] = append(append(bodies[g], line...), '\n')
	}
	n := 0
	for _, b := range bodies {
		if len(b) > 0 {
			c.publish(tb, subject, b)
			n++
		}
	}
	return n
}

// consumerState returns the shared consumer's pending and ack-pending
// counts, or false before the consumer exists.
func (c *streamClient) consumerState(tb testing.TB) (pending uint64, ackPending int, ok bool) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	cons, err := c.js.Consumer(ctx, testStream, testDurable)
	if err != nil {
		return 0, 0, false
	}
	info, err := cons.Info(ctx)
	if err != nil {
		return 0, 0, false
	}
	return info.NumPending, info.NumAckPending, true
}

// waitDrained waits until every message was delivered and acknowledged.
func (c *streamClient) waitDrained(tb testing.TB, within time.Duration) {
	tb.Helper()
	deadline := time.Now().Add(within)
	for {
		p, ap, ok := c.consumerState(tb)
		if ok && p == 0 && ap == 0 {
			return
		}
		if time.Now().After(deadline) {
			tb.Fatalf("stream not drained within %v: %d pending, %d unacknowledged", within, p, ap)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// rejectWatch collects the records published to the .rejected subjects.
type rejectWatch struct {
	mu   sync.Mutex
	recs map[string][]natsjs.Rejection
}

func (c *streamClient) watchRejects(tb testing.TB) *rejectWatch {
	tb.Helper()
	w := &rejectWatch{recs: map[string][]natsjs.Rejection{}}
	sub, err := c.nc.Subscribe("cwtest.*.rejected", func(m *nats.Msg) {
		w.mu.Lock()
		defer w.mu.Unlock()
		sc := bufio.NewScanner(bytes.NewReader(m.Data))
		sc.Buffer(nil, 1<<20)
		for sc.Scan() {
			var r natsjs.Rejection
			if err := json.Unmarshal(sc.Bytes(), &r); err == nil {
				w.recs[m.Subject] = append(w.recs[m.Subject], r)
			}
		}
	})
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { _ = sub.Unsubscribe() })
	if err := c.nc.Flush(); err != nil {
		tb.Fatal(err)
	}
	return w
}

func (w *rejectWatch) get(subject string) []natsjs.Rejection {
	w.mu.Lock()
	defer w.mu.Unlock()
	return append([]natsjs.Rejection(nil), w.recs[subject]...)
}

// waitReady polls /readyz until it answers 200.
func waitReady(tb testing.TB, base string) {
	tb.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		resp, err := http.Get(base + "/readyz")
		if err == nil {
			io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return
			}
		}
		if time.Now().After(deadline) {
			tb.Fatalf("%s/readyz not 200 within 30s", base)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// comparable keeps the families that must not depend on how lines came
// in: the window figures and the contract's counters. Ingest-path metrics
// (classwatch_collector_*, classwatch_jetstream_*, classwatch_source_*)
// and the Go runtime's differ by design.
func comparable(e exposition) exposition {
	out := exposition{}
	for name, series := range e {
		if !strings.HasPrefix(name, "classwatch_") || strings.HasPrefix(name, "classwatch_collector_") ||
			strings.HasPrefix(name, "classwatch_jetstream_") || strings.HasPrefix(name, "classwatch_source_") {
			continue
		}
		out[name] = series
	}
	return out
}

// tcpProxy forwards connections to target until cut, which closes every
// connection and refuses new ones until mend: a network partition
// between a daemon and its PostgreSQL.
type tcpProxy struct {
	ln     net.Listener
	target string
	mu     sync.Mutex
	down   bool
	conns  map[net.Conn]bool
}

func startProxy(tb testing.TB, target string) *tcpProxy {
	tb.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		tb.Fatal(err)
	}
	p := &tcpProxy{ln: ln, target: target, conns: map[net.Conn]bool{}}
	tb.Cleanup(func() { ln.Close(); p.cut() })
	go p.accept()
	return p
}

func (p *tcpProxy) addr() string { return p.ln.Addr().String() }

func (p *tcpProxy) accept() {
	for {
		c, err := p.ln.Accept()
		if err != nil {
			return
		}
		p.mu.Lock()
		if p.down {
			p.mu.Unlock()
			c.Close()
			continue
		}
		up, err := net.DialTimeout("tcp", p.target, 5*time.Second)
		if err != nil {
			p.mu.Unlock()
			c.Close()
			continue
		}
		p.conns[c], p.conns[up] = true, true
		p.mu.Unlock()
		go func() { io.Copy(up, c); up.Close(); c.Close() }()
		go func() { io.Copy(c, up); up.Close(); c.Close() }()
	}
}

// cut drops every connection and refuses new ones.
func (p *tcpProxy) cut() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.down = true
	for c := range p.conns {
		c.Close()
	}
	clear(p.conns)
}

// mend accepts connections again.
func (p *tcpProxy) mend() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.down = false
}
