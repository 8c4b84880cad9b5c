package sim

import (
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"
)

// CardLabelTimeout is card-screen's label_timeout: a payment nobody disputed
// within a simulated week counts as legit. A real bank waits months; the
// scenario compresses its chargebacks to fit (most come within a few days,
// a tenth later, and those turn implied labels into corrections).
const CardLabelTimeout = "7d"

// Config returns the YAML configuration "classwatch demo" runs the daemon
// with, for a simulation with the same opts (Start is required). It uses
// the keys of README.md "Configuration": the embedded store under dataDir, listening on
// listen, an event-time clock (the watermark follows the simulated
// prediction times), 5m buckets, windows short enough to fill within
// minutes at DefaultSpeed plus a one-day window lagged until card-screen's
// labels have matured, which is card-screen's reference_window for the
// early-warning figures (README.md "Early warning").
//
// Its alerts section (the alerts package's rule syntax) holds the rules the
// scenario triggers: on card-screen, the early warning that needs no label
// (EarlyRule: the fraud prevalence estimated from the predicted mix against
// the matured reference day) and the label-based ones (RecallRule, a drop
// of fraud recall against the baseline days before the drift, and a cusum
// on the matured buckets); on ticket-router, the queue mix and output mix
// shifting during the app outage. Rules run on wall-clock schedules, every
// ten simulated hours at opts.Speed (every 5s at DefaultSpeed) but at
// least a second apart, so that the day-long outage is seen.
func Config(listen, dataDir string, opts Options) (string, error) {
	if opts.Start.IsZero() {
		return "", errors.New("demo config needs the simulation's start time")
	}
	// The baseline is the model's days before the new fraud pattern;
	// whole hours, so it is aligned to the buckets. Without a drift it is
	// still the first DefaultDriftAfter.
	drift := opts.DriftAfter
	if drift <= 0 {
		drift = DefaultDriftAfter
	}
	from := opts.Start.UTC().Truncate(time.Hour)
	to := opts.Start.UTC().Add(drift).Truncate(time.Hour)
	every := fmt.Sprintf("@every %s", Schedule(opts.Speed))

	var b strings.Builder
	b.WriteString("# classwatch demo: Plumtwig Mutual, a fictional bank, with simulated traffic.\n")
	fmt.Fprintf(&b, "listen: %s\n", quote(listen))
	b.WriteString("database: \"\"\n")
	fmt.Fprintf(&b, "data_dir: %s\n", quote(dataDir))
	b.WriteString(`clock: event
# Implied labels every half second: at DefaultSpeed that is an hour of
# simulated time.
maintenance_interval: 500ms
bucket: 5m
confidence: 0.95
windows:
  - {name: 1h, length: 1h}
  - {name: 6h, length: 6h}
  - {name: 1d, length: 24h}
  - {name: 3d, length: 72h}
  # Fraud labels are complete once card-screen's label_timeout has passed;
  # a day more leaves the implied labels time to be written.
  - {name: ` + MaturedWindow + `, length: 24h, lag: ` + MaturedLag + `}
models:
`)
	fmt.Fprintf(&b, "  - name: %s\n    classes: [%s]\n", TicketRouter, strings.Join(ticketClasses(), ", "))
	fmt.Fprintf(&b, "  - name: %s\n    classes: [%s]\n    label_timeout: %s\n    default_label: %s\n    reference_window: %s\n",
		CardScreen, strings.Join(cardClasses(), ", "), CardLabelTimeout, Legit, MaturedWindow)
	b.WriteString(demoAlerts(from, to, every))
	return b.String(), nil
}

// demoAlerts is the alerts block of the demo config: every is the rules'
// schedule; from and to bound the recall drop's baseline.
func demoAlerts(from, to time.Time, every string) string {
	return fmt.Sprintf(`alerts:
  # Early warning: no label needed, only the predicted mix of the last day
  # against the matured reference day's confusion matrix.
  - name: %s
    kind: estimated_prevalence_shift
    model: %s
    window: 1d
    classes: [%s]
    # No margin: the reference day exists only from the wave on (its lag
    # reaches the first day then), so there is no quiet stretch to guard.
    margin: 0
    reference: {window: %s}
    schedule: %q
    fire_after: 2
    severity: warning
    annotations:
      description: The predicted mix implies more fraud than in the matured reference day; chargebacks will confirm it days later.
  - name: %s
    kind: drop
    model: %s
    window: 3d
    metric: recall
    classes: [%s]
    margin: 0.05
    reference: {from: %q, to: %q}
    schedule: %q
    fire_after: 2
    severity: critical
    annotations:
      description: Fraud recall is lower than in the baseline days; look for a new fraud pattern by segment.
  - name: card-fraud-recall-cusum
    kind: cusum
    model: %s
    metric: recall
    classes: [%s]
    lag: 72h
    # The validated recall: a reference period read before its chargebacks
    # are all in would look better than it was.
    expected: 0.85
    shift: 0.2
    false_alarm_every: 90d
    schedule: %q
    severity: critical
  - name: ticket-queue-mix-shift
    kind: prevalence_shift
    model: %s
    window: 6h
    reference: {window: 3d}
    psi_threshold: 0.2
    schedule: %q
  - name: ticket-routing-mix-shift
    kind: output_shift
    model: %s
    window: 6h
    reference: {window: 3d}
    psi_threshold: 0.2
    schedule: %q
`, EarlyRule, CardScreen, Fraud, MaturedWindow, every,
		RecallRule, CardScreen, Fraud, stamp(from), stamp(to), every,
		CardScreen, Fraud, every,
		TicketRouter, every, TicketRouter, every)
}

// Names in the demo config that the demo's story refers to.
const (
	// EarlyRule is card-screen's label-free early warning.
	EarlyRule = "card-fraud-estimated-rise"
	// RecallRule is card-screen's fraud recall drop, which needs labels.
	RecallRule = "card-fraud-recall-drop"
	// MaturedWindow is the lagged day that is card-screen's reference.
	MaturedWindow = "1d-matured"
	// MaturedLag is its lag: CardLabelTimeout and a day.
	MaturedLag = "8d"
)

// Schedule returns the wall-clock period of the demo's rules at speed
// (0 means DefaultSpeed): ten simulated hours, whole seconds, at least one.
func Schedule(speed float64) time.Duration {
	if speed <= 0 {
		speed = DefaultSpeed
	}
	d := time.Duration(10 * float64(time.Hour) / speed).Round(time.Second)
	return max(d, time.Second)
}

// quote renders s as a YAML double-quoted scalar: every escape Go's
// strconv.Quote writes is one YAML 1.2 reads the same way.
func quote(s string) string { return strconv.Quote(s) }
