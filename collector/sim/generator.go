package sim

import (
	"container/heap"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"time"
)

// Options configures a simulation. Start is required; every other zero
// field takes its default.
type Options struct {
	// Start is the simulated time at which traffic begins.
	Start time.Time
	// Speed is the number of simulated seconds per real second (Run only);
	// 0 means DefaultSpeed, under which a real minute covers five
	// simulated days.
	Speed float64
	// Seed fixes the random choices: a Generator with the same Options
	// yields the same lines.
	Seed int64
	// Duration is the simulated span Run covers before it returns; 0 runs
	// until its context is done.
	Duration time.Duration
	// DriftAfter is when, after Start, the new fraud pattern appears; 0
	// means DefaultDriftAfter, a negative value never.
	DriftAfter time.Duration
	// OutageAfter is when, after Start, the day-long app outage begins;
	// 0 means DefaultOutageAfter, a negative value never.
	OutageAfter time.Duration
	// Interval is the real time between rounds of posts (Run only); 0
	// means 200ms.
	Interval time.Duration
	// MaxLines caps the lines of one request body (Run only); 0 means 500.
	MaxLines int
}

// Line is one NDJSON line of simulated traffic.
type Line struct {
	// Sent is the simulated time at which the line is sent. A label's "at"
	// is its Sent time; a prediction's "at" may be earlier when its log
	// shipper runs late.
	Sent time.Time
	// Data is the JSON object, without the trailing newline.
	Data []byte
}

// predictionLine and labelLine are the wire forms of README.md "HTTP API".
type predictionLine struct {
	Model     string             `json:"model"`
	ID        string             `json:"id"`
	At        string             `json:"at"`
	Predicted string             `json:"predicted"`
	Scores    map[string]float64 `json:"scores,omitempty"`
	Segment   string             `json:"segment,omitempty"`
}

type labelLine struct {
	Model  string `json:"model"`
	ID     string `json:"id"`
	Actual string `json:"actual"`
	At     string `json:"at"`
}

// Generator yields the scenario's traffic in simulated-time order. It is a
// pure function of its Options: no clock, no I/O. The lines Next returns do
// not depend on how the simulated time is cut into calls. A Generator is
// not safe for concurrent use.
type Generator struct {
	rng      *rand.Rand
	driftAt  time.Time // zero: never
	outageAt time.Time // zero: never
	queues   []queue
	appLogin int // index of the app-login queue

	ticketMax, paymentMax   float64 // thinning bounds, per hour
	nextTicket, nextPayment time.Time
	tickets, payments       int

	pending lineHeap
	seq     uint64
}

// NewGenerator returns a Generator for opts. It fails when Start is zero.
func NewGenerator(opts Options) (*Generator, error) {
	if opts.Start.IsZero() {
		return nil, errors.New("simulation needs a start time")
	}
	start := opts.Start.UTC()
	g := &Generator{
		// The second PCG word is a fixed, arbitrary stream constant.
		rng:    rand.New(rand.NewPCG(uint64(opts.Seed), 0x7469646577617465)),
		queues: ticketQueues(),
	}
	g.driftAt = offset(start, opts.DriftAfter, DefaultDriftAfter)
	g.outageAt = offset(start, opts.OutageAfter, DefaultOutageAfter)
	g.appLogin = slices.IndexFunc(g.queues, func(q queue) bool { return q.name == "app-login" })
	extra := (outageFactor - 1) * g.queues[g.appLogin].share
	g.ticketMax = ticketsPerHour * (1 + ticketDepth) * (1 + extra)
	g.paymentMax = paymentsPerHour * (1 + paymentDepth)
	g.nextTicket = start.Add(g.gap(g.ticketMax))
	g.nextPayment = start.Add(g.gap(g.paymentMax))
	return g, nil
}

// offset returns start+d, start+def when d is 0, and the zero time (never)
// when d is negative.
func offset(start time.Time, d, def time.Duration) time.Time {
	switch {
	case d < 0:
		return time.Time{}
	case d == 0:
		return start.Add(def)
	}
	return start.Add(d)
}

// Next advances the simulation to until and returns the prediction and label
// lines sent at or before it that earlier calls did not return, each slice
// ordered by Sent.
func (g *Generator) Next(until time.Time) (preds, labels []Line) {
	// Arrivals form two non-homogeneous Poisson processes, drawn by
	// thinning: candidates at the maximum rate, each kept with probability
	// rate(t)/max. Taking candidates strictly in time order keeps the
	// random draws, and so the output, independent of how Next is called.
	// An arrival is due when its whole-second time is: lines carry whole
	// seconds, so a line due at until may come from an arrival a fraction
	// of a second later.
	due := func(t time.Time) bool { return !t.Truncate(time.Second).After(until) }
	for due(g.nextTicket) || due(g.nextPayment) {
		if !g.nextTicket.After(g.nextPayment) {
			t := g.nextTicket
			if g.rng.Float64()*g.ticketMax < g.ticketRate(t) {
				g.ticket(t)
			}
			g.nextTicket = t.Add(g.gap(g.ticketMax))
		} else {
			t := g.nextPayment
			if g.rng.Float64()*g.paymentMax < paymentsPerHour*diurnal(t, paymentPeak, paymentDepth) {
				g.payment(t)
			}
			g.nextPayment = t.Add(g.gap(g.paymentMax))
		}
	}
	// Every arrival at or before until is drawn, and each sends its lines
	// no earlier than its own time, so the heap now holds every line due.
	for g.pending.Len() > 0 && !g.pending[0].Sent.After(until) {
		p := heap.Pop(&g.pending).(pendingLine)
		if p.label {
			labels = append(labels, p.Line)
		} else {
			preds = append(preds, p.Line)
		}
	}
	return preds, labels
}

// ticketRate is the ticket arrival rate per hour at t.
func (g *Generator) ticketRate(t time.Time) float64 {
	r := ticketsPerHour * diurnal(t, ticketPeak, ticketDepth)
	if g.inOutage(t) {
		r *= 1 + (outageFactor-1)*g.queues[g.appLogin].share
	}
	return r
}

func (g *Generator) inOutage(t time.Time) bool {
	return !g.outageAt.IsZero() && !t.Before(g.outageAt) && t.Before(g.outageAt.Add(outageLength))
}

// ticket draws one support ticket arriving at t and schedules its lines.
func (g *Generator) ticket(t time.Time) {
	at := t.Truncate(time.Second)
	g.tickets++
	id := fmt.Sprintf("tkt-%07d", g.tickets)
	actual := g.pickQueue(g.inOutage(at))
	pred := actual
	if !g.chance(g.queues[actual].recall) {
		pred = g.misroute(actual)
	}
	line := predictionLine{
		Model:     TicketRouter,
		ID:        id,
		At:        stamp(at),
		Predicted: g.queues[pred].name,
		Scores:    g.ticketScores(pred, pred == actual),
		Segment:   g.pickSegment(ticketChannels()),
	}
	sent := at
	if g.chance(ticketLateShipped) {
		sent = at.Add(g.uniform(2*time.Hour, 6*time.Hour))
	}
	g.sendPrediction(sent, line)
	g.maybeMalformed(sent, line, ticketClasses())

	if g.chance(ticketUnlabeled) {
		return
	}
	// An agent looks at the ticket minutes to hours later.
	d := 2*time.Minute + g.lognormal(40*time.Minute, 1.0)
	if g.chance(ticketCorrected) {
		g.sendLabel(at.Add(d), TicketRouter, id, g.queues[g.misroute(actual)].name)
		d += 30*time.Minute + g.lognormal(2*time.Hour, 0.7)
	}
	g.sendLabel(at.Add(d), TicketRouter, id, g.queues[actual].name)
}

// payment draws one card payment arriving at t and schedules its lines.
func (g *Generator) payment(t time.Time) {
	at := t.Truncate(time.Second)
	g.payments++
	id := fmt.Sprintf("txn-%08d", g.payments)
	drifted := !g.driftAt.IsZero() && !at.Before(g.driftAt)
	u := g.rng.Float64()
	var fraud, newPattern bool
	if drifted {
		newPattern = u < fraudNewAfter
		fraud = u < fraudNewAfter+fraudOldAfter
	} else {
		fraud = u < fraudBefore
	}
	var seg string
	var flagged bool
	switch {
	case newPattern:
		seg, flagged = "online", g.chance(recallNew)
	case fraud:
		seg, flagged = g.pickSegment(fraudChannels()), g.chance(recallOld)
	default:
		seg, flagged = g.pickSegment(legitChannels()), g.chance(falseAlarm)
	}
	score := g.fraudScore(flagged, newPattern)
	pred := Legit
	if flagged {
		pred = Fraud
	}
	line := predictionLine{
		Model:     CardScreen,
		ID:        id,
		At:        stamp(at),
		Predicted: pred,
		Scores:    map[string]float64{Fraud: round3(score), Legit: round3(1 - score)},
		Segment:   seg,
	}
	sent := at
	if g.chance(paymentLateShipped) {
		sent = at.Add(g.uniform(2*time.Hour, 6*time.Hour))
	}
	g.sendPrediction(sent, line)
	g.maybeMalformed(sent, line, cardClasses())

	switch {
	case fraud && flagged:
		// A blocked payment is reviewed within hours; now and then the
		// analyst clears it first and the customer's report corrects it.
		d := 5*time.Minute + g.lognormal(45*time.Minute, 0.9)
		if g.chance(reviewCorrected) {
			g.sendLabel(at.Add(d), CardScreen, id, Legit)
			d += 2*time.Hour + g.lognormal(10*time.Hour, 0.6)
		}
		g.sendLabel(at.Add(d), CardScreen, id, Fraud)
	case fraud:
		// A missed fraud comes back as a chargeback, days or weeks later.
		var d time.Duration
		if g.chance(lateDisputes) {
			d = g.uniform(7*24*time.Hour, 21*24*time.Hour)
		} else {
			d = 6*time.Hour + g.lognormal(24*time.Hour, 0.7)
		}
		g.sendLabel(at.Add(d), CardScreen, id, Fraud)
	case flagged:
		// A false alarm: the customer confirms the payment.
		g.sendLabel(at.Add(10*time.Minute+g.lognormal(3*time.Hour, 0.8)), CardScreen, id, Legit)
	default:
		// Silence, except the few customers who confirm in the app.
		if g.chance(legitConfirmed) {
			g.sendLabel(at.Add(g.uniform(time.Minute, 30*time.Minute)), CardScreen, id, Legit)
		}
	}
}

// fraudScore draws card-screen's fraud score of a payment; the model flags
// at 0.5. The known patterns and legit payments score far from the line;
// the new pattern scores borderline (0.5–0.65 when flagged, 0.3–0.5 when
// not), so the score distribution moves with the drift.
func (g *Generator) fraudScore(flagged, newPattern bool) float64 {
	u := g.rng.Float64()
	switch {
	case newPattern && flagged:
		return 0.5 + 0.15*u
	case newPattern:
		return 0.3 + 0.199*u
	case flagged:
		return 0.5 + 0.49*math.Sqrt(u)
	}
	return 0.49 * math.Pow(u, 3)
}

// sendPrediction schedules a prediction line and, now and then, a resend.
func (g *Generator) sendPrediction(sent time.Time, p predictionLine) {
	data := encode(p)
	g.push(sent, data, false)
	if g.chance(predictionResent) {
		g.push(sent.Add(g.uniform(time.Minute, 10*time.Minute)), data, false)
	}
}

// sendLabel schedules a label known at at and, now and then, a resend.
func (g *Generator) sendLabel(at time.Time, model, id, actual string) {
	data := encode(labelLine{Model: model, ID: id, Actual: actual, At: stamp(at)})
	g.push(at, data, true)
	if g.chance(labelResent) {
		g.push(at.Add(g.uniform(time.Minute, 30*time.Minute)), data, true)
	}
}

// maybeMalformed rarely schedules one line the daemon must reject, made
// from a valid prediction p of a model with the given classes.
func (g *Generator) maybeMalformed(sent time.Time, p predictionLine, classes []string) {
	if !g.chance(malformedRate) {
		return
	}
	when := sent.Add(g.uniform(0, 5*time.Minute))
	switch g.rng.IntN(7) {
	case 0: // cut off mid-line
		data := encode(p)
		g.push(when, data[:len(data)/2], false)
	case 1: // a class the model does not have
		p.Predicted = "unsorted"
		g.push(when, encode(p), false)
	case 2: // a time that is not RFC 3339
		p.At = p.At[:10] + " noon"
		g.push(when, encode(p), false)
	case 3: // no id
		p.ID = ""
		g.push(when, encode(p), false)
	case 4: // the same id with a different prediction: a conflict
		for _, c := range classes {
			if c != p.Predicted {
				p.Predicted = c
				break
			}
		}
		g.push(when, encode(p), false)
	case 5: // a model nobody configured
		p.Model += "-v0"
		g.push(when, encode(p), false)
	default: // a label with a class the model does not have
		g.push(when, encode(labelLine{Model: p.Model, ID: p.ID, Actual: "unsure", At: stamp(when)}), true)
	}
}

// pickQueue draws a ticket's true queue; during the outage app-login
// tickets come outageFactor times as often.
func (g *Generator) pickQueue(outage bool) int {
	w := make([]float64, len(g.queues))
	for i, q := range g.queues {
		w[i] = q.share
		if outage && i == g.appLogin {
			w[i] *= outageFactor
		}
	}
	return g.pick(w)
}

// misroute draws the wrong queue the model picks for a ticket of queue
// actual: near queues often, unrelated ones rarely.
func (g *Generator) misroute(actual int) int {
	w := make([]float64, len(g.queues))
	for i, q := range g.queues {
		if i != actual {
			w[i] = g.queues[actual].near[q.name] + nearBaseline
		}
	}
	return g.pick(w)
}

// ticketScores returns per-queue scores with pred on top: confident when
// the model is right, less so when it is wrong, the rest spread over the
// queues near pred.
func (g *Generator) ticketScores(pred int, right bool) map[string]float64 {
	top := 0.35 + 0.40*g.rng.Float64()
	if right {
		top = 0.55 + 0.43*g.rng.Float64()
	}
	w := make([]float64, len(g.queues))
	var sum float64
	for i, q := range g.queues {
		if i != pred {
			w[i] = (g.queues[pred].near[q.name] + nearBaseline) * (0.5 + g.rng.Float64())
			sum += w[i]
		}
	}
	scores := make(map[string]float64, len(g.queues))
	for i, q := range g.queues {
		if i == pred {
			scores[q.name] = round3(top)
		} else {
			scores[q.name] = round3((1 - top) * w[i] / sum)
		}
	}
	return scores
}

func (g *Generator) pickSegment(segs []segment) string {
	w := make([]float64, len(segs))
	for i, s := range segs {
		w[i] = s.weight
	}
	return segs[g.pick(w)].name
}

// pick draws an index with probability proportional to its weight.
func (g *Generator) pick(w []float64) int {
	var sum float64
	for _, x := range w {
		sum += x
	}
	u := g.rng.Float64() * sum
	last := 0
	for i, x := range w {
		if x <= 0 {
			continue
		}
		if u < x {
			return i
		}
		u -= x
		last = i
	}
	return last // rounding left u at the very top
}

func (g *Generator) chance(p float64) bool { return g.rng.Float64() < p }

// gap draws the wait until the next candidate of a Poisson process with
// rate perHour.
func (g *Generator) gap(perHour float64) time.Duration {
	return time.Duration(g.rng.ExpFloat64() / perHour * float64(time.Hour))
}

func (g *Generator) uniform(lo, hi time.Duration) time.Duration {
	return lo + time.Duration(g.rng.Float64()*float64(hi-lo))
}

// lognormal draws a log-normal duration with the given median and shape σ,
// whole seconds so that every "at" is too.
func (g *Generator) lognormal(median time.Duration, sigma float64) time.Duration {
	d := time.Duration(float64(median) * math.Exp(sigma*g.rng.NormFloat64()))
	return d.Truncate(time.Second)
}

func (g *Generator) push(sent time.Time, data []byte, label bool) {
	g.seq++
	line := Line{Sent: sent.Truncate(time.Second), Data: data}
	heap.Push(&g.pending, pendingLine{Line: line, label: label, seq: g.seq})
}

// stamp formats t as RFC 3339 in UTC, whole seconds.
func stamp(t time.Time) string { return t.UTC().Format(time.RFC3339) }

func round3(x float64) float64 { return math.Round(x*1000) / 1000 }

// encode marshals one of the line types, which cannot fail: they hold only
// strings and finite numbers.
func encode(v any) []byte {
	data, err := json.Marshal(v)
	if err != nil {
		panic(fmt.Sprintf("sim: encode line: %v", err))
	}
	return data
}

// pendingLine is a scheduled line; seq breaks ties of Sent in scheduling
// order, which is deterministic.
type pendingLine struct {
	Line
	label bool
	seq   uint64
}

// lineHeap is a min-heap of pending lines by (Sent, seq).
type lineHeap []pendingLine

func (h lineHeap) Len() int { return len(h) }
func (h lineHeap) Less(i, j int) bool {
	if !h[i].Sent.Equal(h[j].Sent) {
		return h[i].Sent.Before(h[j].Sent)
	}
	return h[i].seq < h[j].seq
}
func (h lineHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i] }
func (h *lineHeap) Push(x any)   { *h = append(*h, x.(pendingLine)) }
func (h *lineHeap) Pop() any {
	old := *h
	n := len(old)
	x := old[n-1]
	*h = old[:n-1]
	return x
}
