package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/alerts/backtest/histgen"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// TestBacktestHarness measures, by running "classwatch rules backtest" on
// generated histories of a card screen (fraud at 2% prevalence, recall
// 0.90, 200 predictions an hour, each fraud confirmed 0–48 hours later;
// legitimate payments are left unlabeled, which no recall figure reads):
//
//   - false alarms per 90 days of hourly floor, drop and cusum rules on
//     stationary histories (5 models × 120 days; 89 days replayed each);
//   - after recall falls to 0.70 (10 models × 45 days, the fall on day
//     35), the median delay to the first firing in hours and in fraud
//     labels known by then for predictions made after the fall, for the
//     three rules and for an oracle CUSUM that knows p0 = 0.90 and p1 =
//     0.70, reads the same matured hourly buckets (lag 48h) and has the
//     threshold that gives one false alarm per 90 days, found by
//     simulating the same process.
//
// It runs only with CLASSWATCH_BACKTEST_HARNESS=1 (about 10 minutes on
// the reference machine) and needs PostgreSQL. The figures are printed
// with -v; README.md "Rule backtest" quotes them.
func TestBacktestHarness(t *testing.T) {
	if os.Getenv("CLASSWATCH_BACKTEST_HARNESS") == "" {
		t.Skip("set CLASSWATCH_BACKTEST_HARNESS=1 to run the measurement harness")
	}
	origin := time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
	from := origin.Add(31 * 24 * time.Hour)
	rules := []string{"floor", "drop", "cusum"}

	// Stationary histories: false alarms.
	stationary := make([]histgen.Spec, 5)
	for i := range stationary {
		stationary[i] = harnessSpec(fmt.Sprintf("screen-s%d", i), origin, 120, uint64(100+i))
	}
	statEnd := origin.Add(120 * 24 * time.Hour)
	url := pgtest.URL(t) // one schema; the two runs' models differ
	statTrials := ingestHarness(t, url, stationary)
	statRep := runHarnessBacktest(t, url, stationary[0].Model, from, statEnd)
	days := float64(len(stationary)) * statEnd.Sub(from).Hours() / 24
	h := calibrateOracle(t, 0.9, 0.7, 200*0.02, 90*24)
	oracleAlarms := 0
	for _, s := range stationary {
		oracleAlarms += len(oracleAlarmsAt(statTrials[s.Model], from, statEnd, 0.9, 0.7, h))
	}
	t.Logf("false alarms per 90 days over %.0f stationary days (hourly evaluation):", days)
	for _, r := range rules {
		n := statRep.episodes(r)
		t.Logf("  %-6s %3d episodes = %.2f per 90 days", r, n, float64(n)/(days/90))
	}
	t.Logf("  oracle %3d alarms   = %.2f per 90 days (threshold %.3f nats)", oracleAlarms, float64(oracleAlarms)/(days/90), h)

	// Drifting histories: detection delays.
	drift := make([]histgen.Spec, 10)
	for i := range drift {
		drift[i] = harnessSpec(fmt.Sprintf("screen-d%d", i), origin, 45, uint64(200+i))
		drift[i].ChangeAt = origin.Add(35*24*time.Hour + time.Duration(i)*137*time.Minute)
		drift[i].RecallAfter = 0.7
	}
	driftEnd := origin.Add(45 * 24 * time.Hour)
	driftTrials := ingestHarness(t, url, drift)
	driftRep := runHarnessBacktest(t, url, drift[0].Model, from, driftEnd)
	delays := map[string][][2]float64{}
	for _, s := range drift {
		trials := driftTrials[s.Model]
		for _, r := range rules {
			if at, ok := driftRep.firstFiring(r, s.Model, s.ChangeAt); ok {
				delays[r] = append(delays[r], [2]float64{at.Sub(s.ChangeAt).Hours(), labelsKnown(trials, s.ChangeAt, at)})
			}
		}
		for _, at := range oracleAlarmsAt(trials, from, driftEnd, 0.9, 0.7, h) {
			if !at.Before(s.ChangeAt) {
				delays["oracle"] = append(delays["oracle"], [2]float64{at.Sub(s.ChangeAt).Hours(), labelsKnown(trials, s.ChangeAt, at)})
				break
			}
		}
	}
	t.Logf("after recall falls from 0.90 to 0.70 (%d histories), median delay to the first firing:", len(drift))
	medians := map[string]float64{}
	for _, r := range append(rules, "oracle") {
		hours, labels := median(delays[r], 0), median(delays[r], 1)
		medians[r] = hours
		t.Logf("  %-6s %5.1f h (%4.1f h after the 48 h lag), %4.0f fraud labels (detected %d of %d)",
			r, hours, hours-48, labels, len(delays[r]), len(drift))
	}
	t.Logf("cusum / oracle median delay: %.2f", medians["cusum"]/medians["oracle"])
	if len(delays["oracle"]) < len(drift)/2 {
		t.Errorf("the oracle detected only %d of %d falls: the harness is broken", len(delays["oracle"]), len(drift))
	}
}

// harnessSpec is one history of the harness.
func harnessSpec(model string, origin time.Time, days int, seed uint64) histgen.Spec {
	return histgen.Spec{
		Model: model, Start: origin, Hours: days * 24, PerHour: 200,
		Prevalence: 0.02, Recall: 0.9, FalsePositive: 0.01, LabelDelay: 48 * time.Hour,
		Bucket: time.Hour, Seed: seed,
	}
}

// ingestHarness stores the histories and returns each one's frauds.
func ingestHarness(t *testing.T, url string, specs []histgen.Spec) map[string][]histgen.Trial {
	t.Helper()
	ctx := t.Context()
	st := pgstoretest.Open(t, url)
	out := map[string][]histgen.Trial{}
	for _, s := range specs {
		began := time.Now()
		if _, err := st.EnsureModel(ctx, s.Model, histgen.Classes, 0); err != nil {
			t.Fatal(err)
		}
		sum, err := histgen.Ingest(ctx, st, s, 20_000)
		if err != nil {
			t.Fatal(err)
		}
		out[s.Model] = sum.Frauds
		t.Logf("stored %s: %d predictions, %d fraud labels in %s", s.Model, sum.Predictions, sum.Labels, time.Since(began).Round(time.Second))
	}
	return out
}

// harnessReport is the backtest's JSON answer.
type harnessReport struct {
	Rules []struct {
		Rule     string           `json:"rule"`
		Episodes []harnessEpisode `json:"episodes"`
	} `json:"rules"`
}

type harnessEpisode struct {
	Model    string    `json:"model"`
	FiringAt time.Time `json:"firing_at"`
}

func (r harnessReport) episodes(rule string) int {
	for _, x := range r.Rules {
		if x.Rule == rule {
			return len(x.Episodes)
		}
	}
	return 0
}

// firstFiring returns rule's first firing on model at or after since.
func (r harnessReport) firstFiring(rule, model string, since time.Time) (time.Time, bool) {
	for _, x := range r.Rules {
		if x.Rule != rule {
			continue
		}
		for _, e := range x.Episodes {
			if e.Model == model && !e.FiringAt.Before(since) {
				return e.FiringAt, true
			}
		}
	}
	return time.Time{}, false
}

// runHarnessBacktest runs "classwatch rules backtest" over the models
// named like model (the same prefix), hourly floor, drop and cusum rules.
func runHarnessBacktest(t *testing.T, url, model string, from, to time.Time) harnessReport {
	t.Helper()
	prefix := strings.TrimRight(model, "0123456789")
	dir := t.TempDir()
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %q\ndatabase: %q\nbucket: 1h\n", filepath.Join(dir, "data"), url)
	b.WriteString(`windows:
  - {name: day-matured, length: 24h, lag: 48h}
  - {name: month-matured, length: 672h, lag: 72h}
alerts:
`)
	for _, r := range []struct{ name, body string }{
		{"floor", "kind: floor, window: day-matured, metric: recall, threshold: 0.85"},
		{"drop", "kind: drop, window: day-matured, reference: {window: month-matured}"},
		{"cusum", "kind: cusum, metric: recall, lag: 48h, reference: {window: month-matured}, shift: 0.2, false_alarm_every: 90d"},
	} {
		fmt.Fprintf(&b, "  - {name: %s, model: all, classes: [fraud], schedule: \"0 * * * *\", %s}\n", r.name, r.body)
	}
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(b.String()), 0o600); err != nil {
		t.Fatal(err)
	}
	var out, errb bytes.Buffer
	began := time.Now()
	err := run(t.Context(), []string{"rules", "backtest", "--config", path, "--from", from.Format(time.RFC3339),
		"--to", to.Format(time.RFC3339), "--format", "json"}, &out, &errb)
	if err != nil {
		t.Fatalf("classwatch rules backtest: %v\n%s", err, &errb)
	}
	t.Logf("backtest of the %s* histories took %s", prefix, time.Since(began).Round(time.Second))
	var rep harnessReport
	if err := json.Unmarshal(out.Bytes(), &rep); err != nil {
		t.Fatal(err)
	}
	// Keep only this run's models (the schema holds both runs').
	for i := range rep.Rules {
		rep.Rules[i].Episodes = slices.DeleteFunc(rep.Rules[i].Episodes, func(e harnessEpisode) bool {
			return !strings.HasPrefix(e.Model, prefix)
		})
	}
	return rep
}

// labelsKnown counts the fraud labels known at at for predictions made
// since change.
func labelsKnown(trials []histgen.Trial, change, at time.Time) float64 {
	n := 0
	for _, tr := range trials {
		if !tr.At.Before(change) && !tr.LabelAt.After(at) {
			n++
		}
	}
	return float64(n)
}

func median(xs [][2]float64, k int) float64 {
	if len(xs) == 0 {
		return math.NaN()
	}
	v := make([]float64, len(xs))
	for i, x := range xs {
		v[i] = x[k]
	}
	slices.Sort(v)
	if len(v)%2 == 1 {
		return v[len(v)/2]
	}
	return (v[len(v)/2-1] + v[len(v)/2]) / 2
}

// cusumWeights are the Bernoulli CUSUM's log-likelihood ratios of a
// caught and a missed fraud for a fall from p0 to p1 (Page 1954; the
// Bernoulli form as in Reynolds & Stoumbos 1999).
func cusumWeights(p0, p1 float64) (caught, missed float64) {
	return math.Log(p1 / p0), math.Log((1 - p1) / (1 - p0))
}

// oracleAlarmsAt runs the oracle CUSUM at each hour in [from, to): the
// hourly buckets whose start lies before W − 48h (W the watermark, the end
// of the current hour) enter once, in order, with the frauds whose labels
// are known by then. After an alarm the statistic restarts at 0.
func oracleAlarmsAt(trials []histgen.Trial, from, to time.Time, p0, p1, h float64) []time.Time {
	wc, wm := cusumWeights(p0, p1)
	var alarms []time.Time
	s, i := 0.0, 0
	next := from.Add(time.Hour - 48*time.Hour) // first bucket end not yet read
	for at := from; at.Before(to); at = at.Add(time.Hour) {
		limit := at.Add(time.Hour - 48*time.Hour) // W − lag
		for ; !next.After(limit); next = next.Add(time.Hour) {
			start := next.Add(-time.Hour)
			var x float64
			for ; i < len(trials) && trials[i].At.Before(next); i++ {
				tr := trials[i]
				if tr.At.Before(start) || tr.LabelAt.After(at) {
					continue
				}
				if tr.Caught {
					x += wc
				} else {
					x += wm
				}
			}
			s = max(0, s+x)
		}
		if s >= h {
			alarms = append(alarms, at)
			s = 0
		}
	}
	return alarms
}

// calibrateOracle finds by bisection the threshold whose mean time to a
// false alarm, simulating the oracle's hourly buckets (Poisson(rate)
// frauds an hour, each caught with p0), is target hours.
func calibrateOracle(t *testing.T, p0, p1, rate float64, target float64) float64 {
	t.Helper()
	wc, wm := cusumWeights(p0, p1)
	arl := func(h float64) float64 {
		rng := rand.New(rand.NewPCG(1, 2))
		const runs = 400
		total := 0.0
		for range runs {
			s, hours := 0.0, 0
			for s < h && hours < 100*int(target) {
				n := poisson(rng, rate)
				for range n {
					if rng.Float64() < p0 {
						s += wc
					} else {
						s += wm
					}
				}
				s = max(0, s)
				hours++
			}
			total += float64(hours)
		}
		return total / runs
	}
	lo, hi := 0.1, 20.0
	for range 30 {
		mid := (lo + hi) / 2
		if arl(mid) < target {
			lo = mid
		} else {
			hi = mid
		}
	}
	t.Logf("oracle threshold %.3f nats: simulated mean time to a false alarm %.0f h (target %.0f h)", hi, arl(hi), target)
	return hi
}

// poisson draws from Poisson(mean) by Knuth's multiplication method.
func poisson(rng *rand.Rand, mean float64) int {
	l, k, p := math.Exp(-mean), 0, 1.0
	for {
		p *= rng.Float64()
		if p <= l {
			return k
		}
		k++
	}
}
