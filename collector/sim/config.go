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
// labels have matured, and the scenario's two models.
//
// Its alerts section (the alerts package's rule syntax) holds the rules the
// scenario triggers: card-screen's fraud recall dropping against the
// baseline period before the drift (a per-window drop test, and a cusum
// on the matured buckets), and the ticket queue mix and output mix
// shifting during the app outage. Rules run on wall-clock schedules, and at
// DefaultSpeed 5s of wall time are 10 simulated hours: the shift rules run
// that often so that the day-long outage (12s of wall time) is seen.
func Config(listen, dataDir string, opts Options) (string, error) {
	if opts.Start.IsZero() {
		return "", errors.New("demo config needs the simulation's start time")
	}
	// The baseline is the model's first days, before the new fraud pattern;
	// whole hours, so it is aligned to the buckets. Without a drift it is
	// still the first DefaultDriftAfter.
	drift := opts.DriftAfter
	if drift <= 0 {
		drift = DefaultDriftAfter
	}
	from := opts.Start.UTC().Truncate(time.Hour)
	to := opts.Start.UTC().Add(drift).Truncate(time.Hour)

	var b strings.Builder
	b.WriteString("# classwatch demo: Plumtwig Mutual, a fictional bank, with simulated traffic.\n")
	fmt.Fprintf(&b, "listen: %s\n", quote(listen))
	b.WriteString("database: \"\"\n")
	fmt.Fprintf(&b, "data_dir: %s\n", quote(dataDir))
	b.WriteString(`clock: event
bucket: 5m
confidence: 0.95
windows:
  - {name: 1h, length: 1h}
  - {name: 6h, length: 6h}
  - {name: 1d, length: 24h}
  - {name: 3d, length: 72h}
  # Fraud labels are complete only once card-screen's label_timeout has passed.
  - {name: 1d-matured, length: 24h, lag: ` + CardLabelTimeout + `}
models:
`)
	fmt.Fprintf(&b, "  - name: %s\n    classes: [%s]\n", TicketRouter, strings.Join(ticketClasses(), ", "))
	fmt.Fprintf(&b, "  - name: %s\n    classes: [%s]\n    label_timeout: %s\n    default_label: %s\n",
		CardScreen, strings.Join(cardClasses(), ", "), CardLabelTimeout, Legit)
	fmt.Fprintf(&b, `alerts:
  - name: card-fraud-recall-drop
    kind: drop
    model: %s
    window: 3d
    metric: recall
    classes: [%s]
    margin: 0.05
    reference: {from: %q, to: %q}
    schedule: "@every 10s"
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
    reference: {from: %q, to: %q}
    shift: 0.2
    false_alarm_every: 90d
    schedule: "@every 10s"
    severity: critical
  - name: ticket-queue-mix-shift
    kind: prevalence_shift
    model: %s
    window: 6h
    reference: {window: 3d}
    psi_threshold: 0.2
    schedule: "@every 5s"
  - name: ticket-routing-mix-shift
    kind: output_shift
    model: %s
    window: 6h
    reference: {window: 3d}
    psi_threshold: 0.2
    schedule: "@every 5s"
`, CardScreen, Fraud, stamp(from), stamp(to), CardScreen, Fraud, stamp(from), stamp(to), TicketRouter, TicketRouter)
	return b.String(), nil
}

// quote renders s as a YAML double-quoted scalar: every escape Go's
// strconv.Quote writes is one YAML 1.2 reads the same way.
func quote(s string) string { return strconv.Quote(s) }
