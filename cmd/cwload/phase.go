package main

import (
	"context"
	"fmt"
	"io"
	"math"
	"slices"
	"sync"
	"sync/atomic"
	"time"
)

// phase is one timed run of batches: a store or HTTP phase of predictions
// or labels.
type phase struct {
	Name string
	// HTTP marks a phase that pushed to the daemon; the others called the
	// store in this process.
	HTTP   bool
	Events int
	Wall   time.Duration
	// P50, P99 and Max are batch latencies: a store call, or an HTTP
	// request from its first byte sent to its answer read.
	P50, P99, Max time.Duration
	// Retries counts 503 answers that were retried.
	Retries int
	// CPU is the CPU time used during the phase.
	CPU cpuTimes
	// Load is the host's 1-minute load average at the end of the phase.
	Load float64
	// PeakRSS is the daemon's largest sampled RSS during the phase (HTTP
	// phases only).
	PeakRSS int64
}

// Work is the CPU time of the system under test: the daemon (HTTP) or this
// process (store), plus the PostgreSQL backends.
func (p phase) Work() time.Duration {
	if p.HTTP {
		return p.CPU.daemon + p.CPU.postgres
	}
	return p.CPU.self + p.CPU.postgres
}

// Rate is the phase's sustained events per second.
func (p phase) Rate() float64 {
	if p.Wall <= 0 {
		return 0
	}
	return float64(p.Events) / p.Wall.Seconds()
}

// meter reads the CPU times a phase reports: those of the daemon (pid,
// or 0 when none runs) and of the backends of the harness's databases.
type meter struct {
	pid int
	srv *server
}

func (m meter) read(ctx context.Context) (cpuSnapshot, error) {
	pids, err := m.srv.backends(ctx)
	if err != nil {
		return cpuSnapshot{}, err
	}
	return readCPU(m.pid, pids)
}

// batchFunc runs batch i and returns its latency and the retries it took.
type batchFunc func(ctx context.Context, i int) (latency time.Duration, retries int, err error)

// runPhase runs n batches with `clients` workers taking batches in order,
// and prints progress every progressEvery. lines(i) is the size of batch i.
// The first error stops the phase.
func runPhase(ctx context.Context, name string, n, clients int, lines func(i int) int, m meter, do batchFunc, progress io.Writer) (phase, error) {
	ph := phase{Name: name}
	for i := range n {
		ph.Events += lines(i)
	}
	ctx, cancel := context.WithCancelCause(ctx)
	defer cancel(nil)

	var (
		next, done atomic.Int64
		mu         sync.Mutex
		latencies  = make([]time.Duration, n)
		wg         sync.WaitGroup
	)
	cpu0, err := m.read(ctx)
	if err != nil {
		return ph, err
	}
	start := time.Now()
	stopProgress := reportProgress(name, ph.Events, start, &done, progress)
	for range clients {
		wg.Go(func() {
			for {
				i := int(next.Add(1) - 1)
				if i >= n || ctx.Err() != nil {
					return
				}
				lat, retries, err := do(ctx, i)
				if err != nil {
					cancel(fmt.Errorf("%s batch %d: %w", name, i, err))
					return
				}
				latencies[i] = lat
				done.Add(int64(lines(i)))
				mu.Lock()
				ph.Retries += retries
				mu.Unlock()
			}
		})
	}
	wg.Wait()
	ph.Wall = time.Since(start)
	stopProgress()
	if err := context.Cause(ctx); err != nil {
		return ph, err
	}
	cpu1, err := m.read(ctx)
	if err != nil {
		return ph, err
	}
	ph.CPU = cpu1.since(cpu0)
	ph.Load, err = loadAverage()
	if err != nil {
		return ph, err
	}
	slices.Sort(latencies)
	ph.P50, ph.P99, ph.Max = percentile(latencies, 0.50), percentile(latencies, 0.99), latencies[len(latencies)-1]
	fmt.Fprintf(progress, "%-20s done: %d events in %v, %.0f events/s, batch p50 %v p99 %v\n",
		name, ph.Events, ph.Wall.Round(time.Millisecond), ph.Rate(), ph.P50.Round(time.Millisecond), ph.P99.Round(time.Millisecond))
	return ph, nil
}

// percentile is the nearest-rank percentile of sorted values: the smallest
// value with at least q of the values at or below it.
func percentile(sorted []time.Duration, q float64) time.Duration {
	if len(sorted) == 0 {
		return 0
	}
	rank := int(math.Ceil(q*float64(len(sorted)))) - 1
	return sorted[min(max(rank, 0), len(sorted)-1)]
}

// progressEvery is how often a running phase prints its progress.
const progressEvery = 5 * time.Second

// reportProgress prints done/total and the rate so far every
// progressEvery until the returned func is called.
func reportProgress(name string, total int, start time.Time, done *atomic.Int64, w io.Writer) (stop func()) {
	quit := make(chan struct{})
	finished := make(chan struct{})
	go func() {
		defer close(finished)
		t := time.NewTicker(progressEvery)
		defer t.Stop()
		for {
			select {
			case <-quit:
				return
			case <-t.C:
				d := done.Load()
				fmt.Fprintf(w, "%-20s %8d/%d events, %.0f events/s\n", name, d, total, float64(d)/time.Since(start).Seconds())
			}
		}
	}()
	return func() { close(quit); <-finished }
}
