package main

import (
	"fmt"
	"io"
	"maps"
	"runtime"
	"slices"
	"strings"
	"time"
)

// report is a run's figures.
type report struct {
	opts                 options
	predictions, labels  int
	httpPred, streamPred phase
	streamLab, httpLab   phase
	checked              bool
	overload             *overloadResult
	counters             map[string]float64
}

func (r *report) print(w io.Writer) {
	fmt.Fprintf(w, "cwstream: %d predictions + %d labels per path, %d-line batches, %d clients/workers, %d CPUs\n",
		r.predictions, r.labels, r.opts.Batch, r.opts.Clients, runtime.NumCPU())
	fmt.Fprintf(w, "%-20s %10s %9s %11s %10s %9s\n", "phase", "lines", "seconds", "lines/s", "publish s", "max lag")
	row := func(name string, p phase) {
		if p.took == 0 {
			return
		}
		fmt.Fprintf(w, "%-20s %10d %9.2f %11.0f", name, p.lines, p.took.Seconds(), p.rate())
		if p.publish > 0 {
			fmt.Fprintf(w, " %10.2f %9d", p.publish.Seconds(), p.maxLag)
		}
		fmt.Fprintln(w)
	}
	row("http predictions", r.httpPred)
	row("stream predictions", r.streamPred)
	row("stream labels", r.streamLab)
	row("http labels", r.httpLab)
	ratio := func(s, h phase) float64 { return s.rate() / h.rate() }
	if r.httpLab.took > 0 {
		combined := func(a, b phase) float64 { return float64(a.lines+b.lines) / (a.took + b.took).Seconds() }
		fmt.Fprintf(w, "stream/http: predictions %.2f, labels %.2f, combined %.2f (%.0f vs %.0f lines/s)\n",
			ratio(r.streamPred, r.httpPred), ratio(r.streamLab, r.httpLab),
			combined(r.streamPred, r.streamLab)/combined(r.httpPred, r.httpLab),
			combined(r.streamPred, r.streamLab), combined(r.httpPred, r.httpLab))
	}
	fmt.Fprintf(w, "counts of both paths equal and complete: %v\n", r.checked)
	if o := r.overload; o != nil {
		fmt.Fprintf(w, "overload: published %d lines in %s (%.0f lines/s, target %.0f = 2x the stream rate)\n",
			o.sentLines, o.publishFor.Round(time.Millisecond), float64(o.sentLines)/o.publishFor.Seconds(), o.targetLines)
		fmt.Fprintf(w, "  pending messages each second: %v\n", o.samples)
		fmt.Fprintf(w, "  drained %s after publishing stopped\n", o.drain.Round(time.Millisecond))
	}
	names := slices.Sorted(maps.Keys(r.counters))
	for _, n := range names {
		if v := r.counters[n]; v != 0 && !strings.Contains(n, "seconds") {
			fmt.Fprintf(w, "  %s %g\n", n, v)
		}
	}
}
