package sim

import (
	"math"
	"time"
)

// Model names of the scenario.
const (
	TicketRouter = "ticket-router"
	CardScreen   = "card-screen"
)

// Card-screen classes.
const (
	Legit = "legit"
	Fraud = "fraud"
)

// Scenario rates and probabilities. They are the simulation's specification:
// the tests check that generated traffic matches them.
const (
	// ticketsPerHour and paymentsPerHour are the mean arrival rates in
	// simulated time; the time of day scales them (see diurnal).
	ticketsPerHour  = 30.0
	paymentsPerHour = 60.0

	// ticketUnlabeled is the share of tickets no agent ever reviews.
	ticketUnlabeled = 0.08
	// ticketCorrected is the share of reviewed tickets first labeled with a
	// wrong queue and corrected later.
	ticketCorrected = 0.04
	// outageFactor multiplies the app-login ticket rate during the outage.
	outageFactor = 4.0
	// outageLength is how long the app outage lasts.
	outageLength = 24 * time.Hour

	// fraudBefore is the fraud prevalence before the drift; after it, the
	// known pattern keeps fraudOldAfter and a wave of the new one adds
	// fraudNewAfter: 7.4% of payments are fraud.
	fraudBefore   = 0.014
	fraudOldAfter = 0.014
	fraudNewAfter = 0.06
	// recallOld and recallNew are the chances that the model flags a fraud
	// of the known and of the new pattern: overall recall is 0.85 before the
	// drift and (0.014·0.85 + 0.06·0.30)/0.074 ≈ 0.404 after it, while the
	// share of payments predicted fraud rises from 0.0158 to 0.0336 at once.
	// The drop is large enough that a three-day window of a few hundred
	// frauds shows it whatever the simulation's start hour.
	recallOld = 0.85
	recallNew = 0.30
	// falseAlarm is the chance that a legit payment is flagged.
	falseAlarm = 0.004
	// legitConfirmed is the share of unflagged legit payments that a
	// customer confirms explicitly; the rest are never labeled.
	legitConfirmed = 0.02
	// reviewCorrected is the share of confirmed frauds first cleared as
	// legit by mistake and corrected later.
	reviewCorrected = 0.05
	// lateDisputes is the share of chargebacks that come weeks late.
	lateDisputes = 0.10

	// Pipeline faults, per line.
	ticketLateShipped  = 0.02  // prediction line sent 2–6 h after its time
	paymentLateShipped = 0.01  // idem for card-screen
	predictionResent   = 0.01  // prediction line sent twice
	labelResent        = 0.02  // label line sent twice
	malformedRate      = 0.001 // a bad line accompanies a prediction
)

// Defaults of Options.
const (
	DefaultSpeed       = 7200.0
	DefaultDriftAfter  = 9 * 24 * time.Hour
	DefaultOutageAfter = 3*24*time.Hour + 9*time.Hour
)

// queue is one ticket-router class.
type queue struct {
	name string
	// share is the queue's share of tickets outside the outage.
	share float64
	// recall is the chance that the model routes its tickets correctly.
	recall float64
	// near weighs the wrong queues the model picks instead (before the
	// baseline weight every pair gets).
	near map[string]float64
}

// nearBaseline is the misrouting weight of any pair of queues, so that every
// cell of the matrix can fill, however unrelated the queues.
const nearBaseline = 0.3

// ticketQueues returns the ticket-router's queues in class order.
func ticketQueues() []queue {
	return []queue{
		{"billing", 0.22, 0.86, map[string]float64{"statements": 6, "cards": 3, "loans": 1, "other": 2}},
		{"cards", 0.17, 0.84, map[string]float64{"fraud-report": 6, "billing": 3, "app-login": 1, "other": 2}},
		{"loans", 0.08, 0.88, map[string]float64{"branch": 3, "billing": 2, "statements": 2, "other": 2}},
		{"fraud-report", 0.05, 0.78, map[string]float64{"cards": 6, "app-login": 2, "other": 2}},
		{"app-login", 0.18, 0.90, map[string]float64{"other": 4, "cards": 2, "fraud-report": 1}},
		{"statements", 0.10, 0.80, map[string]float64{"billing": 6, "branch": 1, "other": 2}},
		{"branch", 0.06, 0.82, map[string]float64{"loans": 3, "other": 4, "statements": 1}},
		{"other", 0.14, 0.60, map[string]float64{"billing": 2, "app-login": 2, "branch": 2, "cards": 1, "statements": 1}},
	}
}

// ticketClasses returns the ticket-router's class names in order.
func ticketClasses() []string {
	qs := ticketQueues()
	out := make([]string, len(qs))
	for i, q := range qs {
		out[i] = q.name
	}
	return out
}

// cardClasses returns card-screen's class names in order.
func cardClasses() []string { return []string{Legit, Fraud} }

// segment is a weighted choice of segment names.
type segment struct {
	name   string
	weight float64
}

func ticketChannels() []segment {
	return []segment{{"email", 0.40}, {"chat", 0.35}, {"phone", 0.25}}
}

func legitChannels() []segment {
	return []segment{{"pos", 0.45}, {"online", 0.40}, {"contactless", 0.15}}
}

func fraudChannels() []segment {
	return []segment{{"online", 0.60}, {"pos", 0.25}, {"contactless", 0.15}}
}

// diurnal returns the time-of-day factor of an arrival rate at t (UTC): a
// cosine with mean 1 around its peak hour, depth 0 (flat) to 1.
func diurnal(t time.Time, peakHour, depth float64) float64 {
	h := float64(t.Hour()) + float64(t.Minute())/60 + float64(t.Second())/3600
	return 1 + depth*math.Cos(2*math.Pi*(h-peakHour)/24)
}

// Time-of-day profiles: payments peak mid-afternoon and stay up in the
// evening; the support desk is busy in office hours and nearly idle at night.
const (
	paymentPeak  = 16.0
	paymentDepth = 0.55
	ticketPeak   = 14.5
	ticketDepth  = 0.80
)
