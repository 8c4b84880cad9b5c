package natsjs

import (
	"fmt"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promauto"
)

// Reasons a message is negatively acknowledged, the reason label of
// classwatch_jetstream_naks_total.
const (
	nakBusy     = "busy"
	nakStore    = "store"
	nakShutdown = "shutdown"
	nakError    = "error"
)

// Reasons a message is refused as a whole (acknowledged without a
// commit), the reason label of classwatch_jetstream_messages_refused_total.
const (
	refuseTooLarge    = "too_large"
	refuseUnparseable = "unparseable"
	refuseSubject     = "subject"
)

// Metrics are the stream sources' Prometheus instruments, shared by every
// source of a process; the source label tells them apart.
type Metrics struct {
	consumed       *prometheus.CounterVec
	redelivered    *prometheus.CounterVec
	acked          *prometheus.CounterVec
	ackErrors      *prometheus.CounterVec
	naks           *prometheus.CounterVec
	refused        *prometheus.CounterVec
	rejectsOut     *prometheus.CounterVec
	rejectsErrors  *prometheus.CounterVec
	pending        *prometheus.GaugeVec
	ackPending     *prometheus.GaugeVec
	up             *prometheus.GaugeVec
	messageSeconds *prometheus.HistogramVec
}

// NewMetrics registers the stream source metrics on reg.
func NewMetrics(reg prometheus.Registerer) (m *Metrics, err error) {
	// promauto panics on a registration conflict, which here can only come
	// from a registry that already holds these names.
	defer func() {
		if r := recover(); r != nil {
			m, err = nil, fmt.Errorf("register stream source metrics: %v", r)
		}
	}()
	f := promauto.With(reg)
	counter := func(name, help string, labels ...string) *prometheus.CounterVec {
		return f.NewCounterVec(prometheus.CounterOpts{Name: name, Help: help}, append([]string{"source"}, labels...))
	}
	gauge := func(name, help string) *prometheus.GaugeVec {
		return f.NewGaugeVec(prometheus.GaugeOpts{Name: name, Help: help}, []string{"source"})
	}
	return &Metrics{
		consumed:      counter("classwatch_jetstream_messages_consumed_total", "Messages fetched from the stream, redeliveries included."),
		redelivered:   counter("classwatch_jetstream_messages_redelivered_total", "Fetched messages that had been delivered before."),
		acked:         counter("classwatch_jetstream_messages_acked_total", "Messages acknowledged after their lines were committed or the message was refused."),
		ackErrors:     counter("classwatch_jetstream_ack_errors_total", "Acknowledgements the server did not confirm; the message comes back and its lines count as duplicates."),
		naks:          counter("classwatch_jetstream_naks_total", "Messages handed back for redelivery, by reason (busy, store, shutdown, error).", "reason"),
		refused:       counter("classwatch_jetstream_messages_refused_total", "Messages acknowledged without a commit because they can never be ingested, by reason.", "reason"),
		rejectsOut:    counter("classwatch_jetstream_rejects_published_total", "Rejection records published to the .rejected subjects."),
		rejectsErrors: counter("classwatch_jetstream_reject_publish_errors_total", "Publishes to the .rejected subjects that failed."),
		pending:       gauge("classwatch_jetstream_consumer_pending_messages", "Messages of the stream the shared consumer has not delivered yet (the consumer's lag)."),
		ackPending:    gauge("classwatch_jetstream_consumer_ack_pending_messages", "Messages delivered to some replica and not acknowledged yet."),
		up:            gauge("classwatch_jetstream_source_up", "1 when the source is connected and its stream and consumer are set up, else 0."),
		messageSeconds: f.NewHistogramVec(prometheus.HistogramOpts{
			Name:                           "classwatch_jetstream_message_duration_seconds",
			Help:                           "Time from a message's fetch to its acknowledgement or nak.",
			Buckets:                        prometheus.ExponentialBuckets(0.001, 4, 8),
			NativeHistogramBucketFactor:    1.1,
			NativeHistogramMaxBucketNumber: 100,
		}, []string{"source"}),
	}, nil
}

// initSource creates a source's zero series so rates and absent() work at once.
func (m *Metrics) initSource(source string) {
	for _, v := range []*prometheus.CounterVec{m.consumed, m.redelivered, m.acked, m.ackErrors, m.rejectsOut, m.rejectsErrors} {
		v.WithLabelValues(source)
	}
	for _, r := range []string{nakBusy, nakStore, nakShutdown, nakError} {
		m.naks.WithLabelValues(source, r)
	}
	for _, r := range []string{refuseTooLarge, refuseUnparseable, refuseSubject} {
		m.refused.WithLabelValues(source, r)
	}
	m.up.WithLabelValues(source).Set(0)
}
