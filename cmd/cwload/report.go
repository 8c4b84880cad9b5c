package main

import (
	"fmt"
	"io"
	"text/tabwriter"
	"time"
)

// ratioTarget is the target for HTTP rate over store rate.
const ratioTarget = 0.60

// scrapeTarget is the target for one scrape of 50 models × 12
// classes × 4 windows.
const scrapeTarget = 100 * time.Millisecond

// print writes the report of the parts that ran.
func (r *results) print(w io.Writer) {
	o := r.Options
	fmt.Fprintf(w, "cwload report, %s (run took %v)\n", r.Started.UTC().Format(time.RFC3339), r.Took.Round(time.Second))
	fmt.Fprintf(w, "host: %d CPUs; postgres: %s\n", r.CPUs, r.Postgres)
	fmt.Fprintf(w, "daemon: %s\n", r.Daemon)
	fmt.Fprintf(w, "host CPU busy before the run: %.2f of %d cores", r.BusyBefore, r.CPUs)
	if r.BusyBefore > 0.2 {
		fmt.Fprint(w, " (other work on the machine: every figure is skewed by it)")
	}
	fmt.Fprintln(w)
	if p := r.Push; p != nil {
		fmt.Fprintf(w, "\ningest: %d predictions + %d labels, %d models × %d classes, batches of %d lines, %d concurrent clients, seed %d\n",
			p.Predictions, p.Labels, o.Models, pushClasses, o.Batch, o.Clients, o.Seed)
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "phase\tevents\twall\tevents/s\tp50\tp99\tmax\t503s\t|\thost\tdaemon\tharness\tpostgres\tother\tload\t|\tCPU ms/1k events\t")
		for _, ph := range []phase{p.StorePredictions, p.HTTPPredictions, p.StoreLabels, p.HTTPLabels} {
			c := ph.CPU
			fmt.Fprintf(tw, "%s\t%d\t%s\t%.0f\t%s\t%s\t%s\t%d\t|\t%s\t%s\t%s\t%s\t%s\t%.1f\t|\t%.1f\t\n", ph.Name, ph.Events, secs(ph.Wall), ph.Rate(),
				ms(ph.P50), ms(ph.P99), ms(ph.Max), ph.Retries, cores(c.host, ph.Wall), cores(c.daemon, ph.Wall),
				cores(c.self, ph.Wall), cores(c.postgres, ph.Wall), cores(c.other(), ph.Wall), ph.Load, perK(ph.Work(), ph.Events))
		}
		tw.Flush()
		fmt.Fprintln(w, "(p50/p99/max: one batch. CPU in cores averaged over the phase: host busy; daemon; harness (the store's")
		fmt.Fprintln(w, " client side in store phases, the HTTP client in HTTP phases); postgres = backends of the run's databases;")
		fmt.Fprintln(w, " other = the rest of the host (postgres background writers, other work). load = 1-min load average at the end.")
		fmt.Fprintln(w, " CPU ms/1k events = CPU of the path under test per 1,000 events: harness + postgres (store), daemon + postgres (HTTP).)")
		storeAll := combined(p.StorePredictions, p.StoreLabels)
		httpAll := combined(p.HTTPPredictions, p.HTTPLabels)
		fmt.Fprintf(w, "HTTP / store rate: predictions %s, labels %s, combined %s (%.0f vs %.0f events/s); target ≥ %.0f%%\n",
			ratio(p.HTTPPredictions.Rate(), p.StorePredictions.Rate()), ratio(p.HTTPLabels.Rate(), p.StoreLabels.Rate()),
			ratio(httpAll, storeAll), httpAll, storeAll, ratioTarget*100)
		storeWork := (p.StorePredictions.Work() + p.StoreLabels.Work()).Seconds()
		httpWork := (p.HTTPPredictions.Work() + p.HTTPLabels.Work()).Seconds()
		fmt.Fprintf(w, "store CPU / HTTP CPU per event: predictions %s, labels %s, combined %s\n",
			ratio(perEvent(p.StorePredictions), perEvent(p.HTTPPredictions)), ratio(perEvent(p.StoreLabels), perEvent(p.HTTPLabels)),
			ratio(storeWork, httpWork))
		fmt.Fprintf(w, "daemon RSS: %s ready, %s peak sampled while pushing, %s at the end, %s VmHWM\n",
			mib(p.RSSReady), mib(p.RSSPeak), mib(p.RSSEnd), mib(p.RSSHWM))
		if p.Checked {
			fmt.Fprintf(w, "check: the counts of %d models and %d window figures (bounds, counts, matrix) match the events sent\n", o.Models, p.WindowsChecked)
		}
	}
	if s := r.Scrape; s != nil {
		fmt.Fprintf(w, "\nscrape: %d models × %d classes × %d windows (%d predictions, %d labels); daemon RSS %s\n",
			s.Models, s.Classes, s.Windows, s.Predictions, s.Labels, mib(s.RSS))
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "variant\tscrapes\tp50\tp95\tmax\tdaemon CPU/scrape\tsamples\tconfusion\tbytes\ton the wire\tcontent type\t")
		for _, v := range s.Variants {
			fmt.Fprintf(tw, "%s\t%d\t%s\t%s\t%s\t%s\t%d\t%d\t%d\t%d\t%s\t\n", v.Name, v.Scrapes, ms(v.P50), ms(v.P95), ms(v.Max),
				ms(v.DaemonCPU), v.Samples, v.Confusion, v.Bytes, v.WireBytes, v.ContentType)
		}
		tw.Flush()
		fmt.Fprintf(w, "(time: request sent to last body byte read, on loopback; target < %v)\n", scrapeTarget)
	}
}

// combined is the events per second of two phases run one after the other.
func combined(a, b phase) float64 {
	return float64(a.Events+b.Events) / (a.Wall + b.Wall).Seconds()
}

func ratio(a, b float64) string {
	if b == 0 {
		return "n/a"
	}
	return fmt.Sprintf("%.0f%%", 100*a/b)
}

// perEvent is the CPU seconds of the path under test per event.
func perEvent(p phase) float64 {
	if p.Events == 0 {
		return 0
	}
	return p.Work().Seconds() / float64(p.Events)
}

func perK(cpu time.Duration, events int) float64 {
	if events == 0 {
		return 0
	}
	return float64(cpu) / float64(time.Millisecond) / float64(events) * 1000
}

func secs(d time.Duration) string { return fmt.Sprintf("%.1fs", d.Seconds()) }

func ms(d time.Duration) string { return fmt.Sprintf("%.1fms", float64(d)/float64(time.Millisecond)) }

func cores(cpu, wall time.Duration) string {
	if wall <= 0 {
		return "n/a"
	}
	return fmt.Sprintf("%.2f", cpu.Seconds()/wall.Seconds())
}

func mib(b int64) string { return fmt.Sprintf("%.0f MiB", float64(b)/(1<<20)) }
