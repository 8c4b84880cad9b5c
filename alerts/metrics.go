package alerts

import (
	"errors"

	"github.com/prometheus/client_golang/prometheus"
)

// metrics are the alert manager's Prometheus metrics.
type metrics struct {
	evaluations    *prometheus.CounterVec
	failures       *prometheus.CounterVec
	missed         *prometheus.CounterVec
	lastEvaluation prometheus.Gauge
	leader         prometheus.Gauge
	sent           *prometheus.CounterVec
	failed         *prometheus.CounterVec
	dropped        *prometheus.CounterVec
	queueLength    *prometheus.GaugeVec
	state          stateCollector
}

func newMetrics(m *Manager) *metrics {
	x := &metrics{
		evaluations: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_evaluations_total",
			Help: "Evaluations of each alert rule.",
		}, []string{"rule"}),
		failures: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_evaluation_failures_total",
			Help: "Evaluations of each alert rule that failed (store or window unavailable, misconfigured model or class).",
		}, []string{"rule"}),
		missed: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_evaluations_missed_total",
			Help: "Scheduled evaluations of each alert rule passed over because the previous one was still running or the process was paused.",
		}, []string{"rule"}),
		lastEvaluation: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "classwatch_alert_last_evaluation_timestamp_seconds",
			Help: "Scheduled time of the latest alert evaluation on this replica, in seconds since the Unix epoch.",
		}),
		leader: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "classwatch_alert_evaluator_leader",
			Help: "1 while this replica holds the alert evaluator lock, else 0.",
		}),
		sent: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_notifications_sent_total",
			Help: "Alerts delivered to each notifier, resends included.",
		}, []string{"notifier"}),
		failed: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_notifications_failed_total",
			Help: "Alerts given up after the last delivery attempt to each notifier.",
		}, []string{"notifier"}),
		dropped: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_alert_notifications_dropped_total",
			Help: "Alerts dropped from each notifier's full queue, oldest first.",
		}, []string{"notifier"}),
		queueLength: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "classwatch_alert_notification_queue_length",
			Help: "Alerts waiting for each notifier.",
		}, []string{"notifier"}),
		state: stateCollector{m: m, desc: prometheus.NewDesc(
			"classwatch_alert_state",
			"1 for each alert that is pending, firing or just resolved, labelled with its state; only the replica holding the evaluator lock reports alerts.",
			[]string{"rule", "model", "class", "predicted", "state"}, nil)},
	}
	// Series exist from the start, so rate() and absent() work at once.
	for _, r := range m.rules {
		x.evaluations.WithLabelValues(r.Name)
		x.failures.WithLabelValues(r.Name)
		x.missed.WithLabelValues(r.Name)
	}
	for _, n := range m.delivery.names() {
		x.sent.WithLabelValues(n)
		x.failed.WithLabelValues(n)
		x.dropped.WithLabelValues(n)
		x.queueLength.WithLabelValues(n)
	}
	return x
}

func (x *metrics) register(reg prometheus.Registerer) error {
	var errs []error
	for _, c := range []prometheus.Collector{x.evaluations, x.failures, x.missed, x.lastEvaluation,
		x.leader, x.sent, x.failed, x.dropped, x.queueLength, x.state} {
		errs = append(errs, reg.Register(c))
	}
	return errors.Join(errs...)
}

// stateCollector reports the alerts held in memory at scrape time.
type stateCollector struct {
	m    *Manager
	desc *prometheus.Desc
}

func (c stateCollector) Describe(ch chan<- *prometheus.Desc) { ch <- c.desc }

func (c stateCollector) Collect(ch chan<- prometheus.Metric) {
	if !c.m.leader.Held() {
		return
	}
	c.m.mu.RLock()
	defer c.m.mu.RUnlock()
	for _, in := range c.m.instances {
		if in.State == StateInactive {
			continue
		}
		ch <- prometheus.MustNewConstMetric(c.desc, prometheus.GaugeValue, 1,
			in.Rule, in.Model, in.Class, in.Predicted, string(in.State))
	}
}
