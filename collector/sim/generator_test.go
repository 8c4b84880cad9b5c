package sim

import (
	"bytes"
	"encoding/json"
	"math"
	"slices"
	"sort"
	"testing"
	"time"
)

// The checks below hold the generated traffic to the scenario's own
// specification (the constants in scenario.go). Tolerances are four
// binomial standard errors, sqrt(p(1−p)/n), of the sample each figure is
// measured on, so a correct generator passes for almost any seed and a
// wrong rate fails; the seeds are fixed, so the tests are repeatable.

var testStart = time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)

const day = 24 * time.Hour

// wirePrediction and wireLabel decode lines strictly, with the field names
// of README.md "HTTP API".
type wirePrediction struct {
	Model     string             `json:"model"`
	ID        string             `json:"id"`
	At        string             `json:"at"`
	Predicted string             `json:"predicted"`
	Scores    map[string]float64 `json:"scores"`
	Segment   string             `json:"segment"`
}

type wireLabel struct {
	Model  string `json:"model"`
	ID     string `json:"id"`
	Actual string `json:"actual"`
	At     string `json:"at"`
}

// scenarioClasses lists the classes a valid line may use, written out here
// rather than taken from the package, so a change to either side shows.
var scenarioClasses = map[string][]string{
	"ticket-router": {"billing", "cards", "loans", "fraud-report", "app-login", "statements", "branch", "other"},
	"card-screen":   {"legit", "fraud"},
}

// decodeStrict decodes one JSON object, refusing unknown fields.
func decodeStrict(data []byte, v any) error {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	return dec.Decode(v)
}

// validPrediction reports whether a prediction line obeys the contract and
// the scenario's configuration, returning its decoded form and time.
func validPrediction(data []byte) (wirePrediction, time.Time, bool) {
	var p wirePrediction
	if err := decodeStrict(data, &p); err != nil {
		return p, time.Time{}, false
	}
	classes, ok := scenarioClasses[p.Model]
	at, err := time.Parse(time.RFC3339, p.At)
	if !ok || p.ID == "" || err != nil || !slices.Contains(classes, p.Predicted) {
		return p, time.Time{}, false
	}
	for k, v := range p.Scores {
		if !slices.Contains(classes, k) || v < 0 || v > 1 {
			return p, time.Time{}, false
		}
	}
	return p, at, true
}

func validLabel(data []byte) (wireLabel, time.Time, bool) {
	var l wireLabel
	if err := decodeStrict(data, &l); err != nil {
		return l, time.Time{}, false
	}
	classes, ok := scenarioClasses[l.Model]
	at, err := time.Parse(time.RFC3339, l.At)
	if !ok || l.ID == "" || err != nil || !slices.Contains(classes, l.Actual) {
		return l, time.Time{}, false
	}
	return l, at, true
}

// pred is a prediction as first stored by a daemon following README.md "Join semantics and windows".
type pred struct {
	wirePrediction
	at   time.Time
	sent time.Time // when its first line was sent
	data string
}

// version is one label version.
type version struct {
	actual string
	at     time.Time
	sent   time.Time
}

// trace is generated traffic joined the way README.md "Join semantics and windows" describes, written
// independently of the daemon.
type trace struct {
	predLines, labelLines int
	invalid               int // lines the daemon must reject as malformed
	conflicts             int // same id, different content
	predResent            int // byte-identical prediction lines after the first
	labelResent           int // byte-identical label lines after the first
	preds                 map[string]*pred
	order                 []string // keys of preds in first-sent order
	labels                map[string][]version
}

func earlier(a, b time.Time) time.Time {
	if a.Before(b) {
		return a
	}
	return b
}

func key(model, id string) string { return model + "/" + id }

// simulate runs a Generator to until in steps and joins what it sends.
func simulate(t *testing.T, opts Options, until time.Time, step time.Duration) *trace {
	t.Helper()
	g, err := NewGenerator(opts)
	if err != nil {
		t.Fatalf("NewGenerator: %v", err)
	}
	tr := &trace{preds: map[string]*pred{}, labels: map[string][]version{}}
	seenLabel := map[string]bool{}
	var last time.Time
	for now := opts.Start; now.Before(until); {
		now = earlier(now.Add(step), until)
		ps, ls := g.Next(now)
		for _, l := range append(slices.Clone(ps), ls...) {
			if l.Sent.After(now) || l.Sent.Before(last) {
				t.Fatalf("line sent at %v returned by Next(%v) after Next(%v)", l.Sent, now, last)
			}
		}
		for _, l := range ps {
			tr.predLines++
			p, at, ok := validPrediction(l.Data)
			if !ok {
				tr.invalid++
				continue
			}
			k := key(p.Model, p.ID)
			if old, ok := tr.preds[k]; ok {
				if old.data == string(l.Data) {
					tr.predResent++
				} else {
					tr.conflicts++
				}
				continue
			}
			tr.preds[k] = &pred{wirePrediction: p, at: at, sent: l.Sent, data: string(l.Data)}
			tr.order = append(tr.order, k)
		}
		for _, l := range ls {
			tr.labelLines++
			lb, at, ok := validLabel(l.Data)
			if !ok {
				tr.invalid++
				continue
			}
			if seenLabel[string(l.Data)] {
				tr.labelResent++
				continue
			}
			if !at.Equal(l.Sent) {
				t.Fatalf("label %s: at %v, first sent %v: a label is sent when it becomes known", l.Data, at, l.Sent)
			}
			seenLabel[string(l.Data)] = true
			k := key(lb.Model, lb.ID)
			tr.labels[k] = append(tr.labels[k], version{actual: lb.Actual, at: at, sent: l.Sent})
		}
		last = now
	}
	return tr
}

// current returns a prediction's current label per README.md "Join semantics and windows" and the store
// contract: the version with the greatest at, ties to the greater actual.
func (tr *trace) current(k string) (string, bool) {
	vs := tr.labels[k]
	if len(vs) == 0 {
		return "", false
	}
	best := vs[0]
	for _, v := range vs[1:] {
		if v.at.After(best.at) || v.at.Equal(best.at) && v.actual > best.actual {
			best = v
		}
	}
	return best.actual, true
}

// firstLabel returns the earliest-sent label version of k.
func (tr *trace) firstLabel(k string) (version, bool) {
	vs := tr.labels[k]
	if len(vs) == 0 {
		return version{}, false
	}
	return slices.MinFunc(vs, func(a, b version) int { return a.sent.Compare(b.sent) }), true
}

// withinSE fails unless got is within four binomial standard errors of the
// specified proportion p over n trials.
func withinSE(t *testing.T, what string, got, p float64, n int) {
	t.Helper()
	if n == 0 {
		t.Fatalf("%s: no sample", what)
	}
	tol := 4 * math.Sqrt(p*(1-p)/float64(n))
	if math.Abs(got-p) > tol {
		t.Errorf("%s = %.4f over %d, want %.4f ± %.4f", what, got, n, p, tol)
	}
}

func TestGeneratorDeterministic(t *testing.T) {
	run := func(seed int64, step time.Duration) []Line {
		g, err := NewGenerator(Options{Start: testStart, Seed: seed})
		if err != nil {
			t.Fatal(err)
		}
		var out []Line
		end := testStart.Add(3 * day)
		for now := testStart; now.Before(end); {
			now = earlier(now.Add(step), end)
			ps, ls := g.Next(now)
			out = append(out, ps...)
			out = append(out, ls...)
		}
		// Within one call predictions come before labels; order both by
		// send time so that runs cut differently compare equal.
		sort.SliceStable(out, func(i, j int) bool { return out[i].Sent.Before(out[j].Sent) })
		return out
	}
	equal := func(a, b []Line) bool {
		return slices.EqualFunc(a, b, func(x, y Line) bool { return x.Sent.Equal(y.Sent) && bytes.Equal(x.Data, y.Data) })
	}
	whole := run(7, 3*day)
	if len(whole) < 1000 {
		t.Fatalf("3 days gave %d lines, want thousands", len(whole))
	}
	// Steps that are not whole seconds cut between an arrival and its line.
	if got := run(7, 7*time.Minute+300*time.Millisecond); !equal(got, whole) {
		t.Errorf("seed 7 in 7m0.3s steps differs from one step (%d vs %d lines)", len(got), len(whole))
	}
	if got := run(7, 3*day); !equal(got, whole) {
		t.Errorf("seed 7 twice gave different lines")
	}
	if got := run(8, 3*day); equal(got, whole) {
		t.Errorf("seeds 7 and 8 gave the same lines")
	}
}

func TestNewGeneratorNeedsStart(t *testing.T) {
	if _, err := NewGenerator(Options{}); err == nil {
		t.Errorf("NewGenerator with zero Start: no error")
	}
}

// TestGeneratorFraudDrift measures card-screen's fraud recall and prevalence
// from the generated prediction/label pairs, before and after the drift.
func TestGeneratorFraudDrift(t *testing.T) {
	t.Parallel()
	drift := 20 * day
	end := testStart.Add(40 * day)
	// Run 25 days past the last prediction counted, longer than the latest
	// chargeback (21 days), so every fraud has its final label.
	tr := simulate(t, Options{Start: testStart, Seed: 1, DriftAfter: drift, OutageAfter: -1}, end.Add(25*day), 6*time.Hour)

	type tally struct{ n, fraud, caught, flagged int }
	var before, after tally
	bySeg := map[string]*tally{}
	for _, k := range tr.order {
		p := tr.preds[k]
		if p.Model != CardScreen || !p.at.Before(end) {
			continue
		}
		actual, ok := tr.current(k)
		if !ok {
			actual = Legit // silence: the configured default_label
		}
		s := &before
		if !p.at.Before(testStart.Add(drift)) {
			s = &after
			if bySeg[p.Segment] == nil {
				bySeg[p.Segment] = &tally{}
			}
			bySeg[p.Segment].n++
			if actual == Fraud {
				bySeg[p.Segment].fraud++
				if p.Predicted == Fraud {
					bySeg[p.Segment].caught++
				}
			}
		}
		s.n++
		if p.Predicted == Fraud {
			s.flagged++
		}
		if actual == Fraud {
			s.fraud++
			if p.Predicted == Fraud {
				s.caught++
			}
		}
	}
	withinSE(t, "prevalence before drift", float64(before.fraud)/float64(before.n), 0.014, before.n)
	withinSE(t, "prevalence after drift", float64(after.fraud)/float64(after.n), 0.074, after.n)
	withinSE(t, "fraud recall before drift", float64(before.caught)/float64(before.fraud), 0.85, before.fraud)
	withinSE(t, "fraud recall after drift", float64(after.caught)/float64(after.fraud), (0.014*0.85+0.06*0.30)/0.074, after.fraud)
	// The predicted mix moves at once, labels or not: 0.014·0.85 +
	// 0.986·0.004 before, 0.014·0.85 + 0.06·0.30 + 0.926·0.004 after.
	withinSE(t, "predicted fraud share before drift", float64(before.flagged)/float64(before.n), 0.014*0.85+0.986*0.004, before.n)
	withinSE(t, "predicted fraud share after drift", float64(after.flagged)/float64(after.n), 0.014*0.85+0.06*0.30+0.926*0.004, after.n)

	// The new pattern is online only: after the drift, online recall is
	// (0.6·0.014·0.85 + 0.06·0.30) / (0.6·0.014 + 0.06) ≈ 0.368,
	// while point-of-sale frauds keep 0.85.
	on, pos := bySeg["online"], bySeg["pos"]
	withinSE(t, "online fraud recall after drift", float64(on.caught)/float64(on.fraud), (0.6*0.014*0.85+0.06*0.30)/(0.6*0.014+0.06), on.fraud)
	withinSE(t, "pos fraud recall after drift", float64(pos.caught)/float64(pos.fraud), 0.85, pos.fraud)
}

// TestGeneratorTickets checks ticket-router's queue mix, its confusion
// structure and the outage's prevalence shift.
func TestGeneratorTickets(t *testing.T) {
	t.Parallel()
	outage := 10 * day
	tr := simulate(t, Options{Start: testStart, Seed: 2, OutageAfter: outage}, testStart.Add(30*day), day)
	outFrom, outTo := testStart.Add(outage), testStart.Add(outage+day)

	share := map[string]float64{
		"billing": 0.22, "cards": 0.17, "loans": 0.08, "fraud-report": 0.05,
		"app-login": 0.18, "statements": 0.10, "branch": 0.06, "other": 0.14,
	}
	recall := map[string]float64{
		"billing": 0.86, "cards": 0.84, "loans": 0.88, "fraud-report": 0.78,
		"app-login": 0.90, "statements": 0.80, "branch": 0.82, "other": 0.60,
	}
	confusion := map[string]map[string]int{}
	actualN := map[string]int{}
	labeled, inOutage, appInOutage := 0, 0, 0
	for _, k := range tr.order {
		p := tr.preds[k]
		if p.Model != TicketRouter {
			continue
		}
		actual, ok := tr.current(k)
		if !ok {
			continue
		}
		if !p.at.Before(outFrom) && p.at.Before(outTo) {
			inOutage++
			if actual == "app-login" {
				appInOutage++
			}
			continue
		}
		labeled++
		actualN[actual]++
		if confusion[actual] == nil {
			confusion[actual] = map[string]int{}
		}
		confusion[actual][p.Predicted]++
	}
	for _, q := range scenarioClasses[TicketRouter] {
		withinSE(t, q+" share", float64(actualN[q])/float64(labeled), share[q], labeled)
		withinSE(t, q+" recall", float64(confusion[q][q])/float64(actualN[q]), recall[q], actualN[q])
	}
	// Similar queues are confused more than unrelated ones.
	for _, c := range []struct{ actual, near, far string }{
		{"billing", "statements", "fraud-report"},
		{"cards", "fraud-report", "loans"},
		{"fraud-report", "cards", "statements"},
		{"statements", "billing", "app-login"},
		{"loans", "branch", "fraud-report"},
	} {
		near, far := confusion[c.actual][c.near], confusion[c.actual][c.far]
		if near <= 3*far {
			t.Errorf("%s tickets sent to %s: %d, to %s: %d; want the near queue over 3× the far one", c.actual, c.near, near, c.far, far)
		}
	}
	// During the outage app-login tickets come 4× as often:
	// 4·0.18 / (1 + 3·0.18) = 0.4675 of the tickets.
	withinSE(t, "app-login share in outage", float64(appInOutage)/float64(inOutage), 4*0.18/(1+3*0.18), inOutage)
}

// TestGeneratorPipelineFaults checks label timing and the rates of
// duplicates, corrections, early labels and malformed lines.
func TestGeneratorPipelineFaults(t *testing.T) {
	t.Parallel()
	end := testStart.Add(30 * day)
	tr := simulate(t, Options{Start: testStart, Seed: 4}, end.Add(25*day), 12*time.Hour)

	var tickets, ticketsLabeled, ticketsCorrected, early int
	var tn, tnLabeled, tp, tpCorrected int
	var ticketDelay, reviewDelay, chargebackDelay []time.Duration
	for _, k := range tr.order {
		p := tr.preds[k]
		if !p.at.Before(end) {
			continue
		}
		first, labeled := tr.firstLabel(k)
		actual, _ := tr.current(k)
		distinct := map[string]bool{}
		for _, v := range tr.labels[k] {
			distinct[v.actual] = true
		}
		switch p.Model {
		case TicketRouter:
			tickets++
			if !labeled {
				continue
			}
			ticketsLabeled++
			ticketDelay = append(ticketDelay, first.at.Sub(p.at))
			if len(distinct) > 1 {
				ticketsCorrected++
			}
			if first.sent.Before(p.sent) {
				early++
			}
		case CardScreen:
			switch {
			case p.Predicted == Legit && actual != Fraud:
				tn++
				if labeled {
					tnLabeled++
				}
			case p.Predicted == Fraud && actual == Fraud:
				tp++
				reviewDelay = append(reviewDelay, first.at.Sub(p.at))
				if len(distinct) > 1 {
					tpCorrected++
				}
			case p.Predicted == Legit && actual == Fraud:
				chargebackDelay = append(chargebackDelay, first.at.Sub(p.at))
			}
		}
	}

	withinSE(t, "unlabeled ticket share", 1-float64(ticketsLabeled)/float64(tickets), 0.08, tickets)
	withinSE(t, "corrected ticket share", float64(ticketsCorrected)/float64(ticketsLabeled), 0.04, ticketsLabeled)
	withinSE(t, "corrected review share", float64(tpCorrected)/float64(tp), 0.05, tp)
	// Most legit payments are never labeled: 2% of customers confirm.
	withinSE(t, "explicitly labeled legit share", float64(tnLabeled)/float64(tn), 0.02, tn)

	// A label comes early when the ticket's line was shipped late (2%),
	// the ticket is reviewed (92%) and the review beats the shipper: the
	// review delay 2m + LogNormal(median 40m, σ 1) against Uniform(2h, 6h).
	pEarly := 0.02 * 0.92 * probReviewBeforeShipper()
	withinSE(t, "early label share", float64(early)/float64(tickets), pEarly, tickets)

	median := func(ds []time.Duration) time.Duration {
		slices.Sort(ds)
		return ds[len(ds)/2]
	}
	// Medians follow from the delay laws: tickets 2m + 40m; reviews
	// 5m + 45m; chargebacks 6h + 24h for the 90% that are not weeks late.
	for _, c := range []struct {
		what   string
		ds     []time.Duration
		lo, hi time.Duration
	}{
		{"ticket label delay", ticketDelay, 30 * time.Minute, time.Hour},
		{"fraud review delay", reviewDelay, 35 * time.Minute, 80 * time.Minute},
		{"chargeback delay", chargebackDelay, 24 * time.Hour, 40 * time.Hour},
	} {
		if len(c.ds) == 0 {
			t.Fatalf("%s: no sample", c.what)
		}
		if m := median(c.ds); m < c.lo || m > c.hi {
			t.Errorf("median %s = %v over %d, want in [%v, %v]", c.what, m, len(c.ds), c.lo, c.hi)
		}
	}
	if m := slices.Max(chargebackDelay); m < 7*day || m > 21*day {
		t.Errorf("latest chargeback after %v, want weeks (7 to 21 days)", m)
	}

	preds := len(tr.preds)
	withinSE(t, "resent prediction share", float64(tr.predResent)/float64(preds), 0.01, preds)
	labelVersions := tr.labelLines - tr.labelResent
	withinSE(t, "resent label share", float64(tr.labelResent)/float64(labelVersions), 0.02, labelVersions)
	// About one malformed line per thousand predictions; one kind in seven
	// is a conflicting resend, which decodes fine but must be rejected.
	bad := tr.invalid + tr.conflicts
	withinSE(t, "malformed line share", float64(bad)/float64(preds), 0.001, preds)
	if tr.conflicts == 0 || tr.invalid == 0 {
		t.Errorf("conflicts %d, invalid lines %d: want both kinds", tr.conflicts, tr.invalid)
	}
}

// probReviewBeforeShipper integrates P(2m + L < S) for L log-normal with
// median 40m and σ 1 and S uniform on [2h, 6h], by the midpoint rule.
func probReviewBeforeShipper() float64 {
	const n = 10000
	var sum float64
	for i := range n {
		s := 2 + 4*(float64(i)+0.5)/n // hours
		z := math.Log((s - 2.0/60) / (40.0 / 60))
		sum += 0.5 * (1 + math.Erf(z/math.Sqrt2))
	}
	return sum / n
}
