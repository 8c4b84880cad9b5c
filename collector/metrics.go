package collector

import (
	"fmt"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promauto"

	"github.com/classwatch/classwatch/windows/store"
)

// Reasons a line is rejected, the reason label of
// classwatch_collector_rejected_lines_total.
const (
	reasonInvalid        = "invalid"
	reasonUnknownModel   = "unknown_model"
	reasonUnknownClass   = "unknown_class"
	reasonTooManyClasses = "too_many_classes"
	reasonTooManyModels  = "too_many_models"
	reasonForbidden      = "forbidden"
	reasonConflict       = "conflict"
	reasonTooOld         = "too_old"
	reasonStoreLimit     = "store_limit"
)

// Label results that do not come from a store outcome.
const (
	resultImplied  = "implied"
	resultExpired  = "expired"
	resultRejected = "rejected"
)

// metrics are the collector's Prometheus instruments.
type metrics struct {
	predictionsReceived *prometheus.CounterVec
	labelsReceived      *prometheus.CounterVec
	rejectedLines       *prometheus.CounterVec
	requestDuration     *prometheus.HistogramVec
	batchLines          *prometheus.HistogramVec
	storeErrors         *prometheus.CounterVec
	inFlight            prometheus.Gauge
	queueTimeouts       *prometheus.CounterVec
	lastPrediction      *prometheus.GaugeVec
	purged              *prometheus.CounterVec
	maintenanceSuccess  prometheus.Gauge
	sourceLinesTotal    *prometheus.CounterVec
	bodyRefusals        *prometheus.CounterVec
}

func newMetrics(reg prometheus.Registerer) (m *metrics, err error) {
	// promauto panics on a registration conflict, which here can only come
	// from the caller handing in a registry that already holds these names.
	defer func() {
		if r := recover(); r != nil {
			m, err = nil, fmt.Errorf("register collector metrics: %v", r)
		}
	}()
	f := promauto.With(reg)
	return &metrics{
		predictionsReceived: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_predictions_received_total",
			Help: "Prediction lines of committed batches that were stored or were duplicates.",
		}, []string{"model"}),
		labelsReceived: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_labels_received_total",
			Help: "Label lines by result (matched, early, duplicate, corrected, rejected), default labels applied (implied) and early labels dropped (expired).",
		}, []string{"model", "result"}),
		rejectedLines: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_collector_rejected_lines_total",
			Help: "Rejected input lines by endpoint and reason.",
		}, []string{"endpoint", "reason"}),
		requestDuration: f.NewHistogramVec(prometheus.HistogramOpts{
			Name:                           "classwatch_collector_request_duration_seconds",
			Help:                           "Time to answer an ingest request, by endpoint and status code.",
			Buckets:                        prometheus.ExponentialBuckets(0.001, 4, 8),
			NativeHistogramBucketFactor:    1.1,
			NativeHistogramMaxBucketNumber: 100,
		}, []string{"endpoint", "code"}),
		batchLines: f.NewHistogramVec(prometheus.HistogramOpts{
			Name:                           "classwatch_collector_batch_lines",
			Help:                           "Non-blank lines per committed batch, by endpoint.",
			Buckets:                        prometheus.ExponentialBuckets(1, 4, 9),
			NativeHistogramBucketFactor:    1.1,
			NativeHistogramMaxBucketNumber: 100,
		}, []string{"endpoint"}),
		storeErrors: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_collector_store_errors_total",
			Help: "Store calls of the collector that failed, by operation.",
		}, []string{"operation"}),
		inFlight: f.NewGauge(prometheus.GaugeOpts{
			Name: "classwatch_collector_in_flight_batches",
			Help: "Batches being decoded or committed now.",
		}),
		queueTimeouts: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_collector_queue_timeouts_total",
			Help: "Requests answered 503 because no in-flight slot freed in time, by endpoint.",
		}, []string{"endpoint"}),
		lastPrediction: f.NewGaugeVec(prometheus.GaugeOpts{
			Name: "classwatch_last_prediction_timestamp_seconds",
			Help: "Greatest event time of a stored prediction, per model, in Unix seconds.",
		}, []string{"model"}),
		purged: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_collector_purged_predictions_total",
			Help: "Raw predictions dropped by retention, per model.",
		}, []string{"model"}),
		sourceLinesTotal: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_source_lines_total",
			Help: "Input lines of committed batches by source (http, file, nats), kind (predictions, labels) and result (accepted, duplicate, rejected).",
		}, []string{"source", "kind", "result"}),
		bodyRefusals: f.NewCounterVec(prometheus.CounterOpts{
			Name: "classwatch_collector_body_refusals_total",
			Help: "Request bodies refused while being read, by endpoint and reason (stalled: slower than the minimum rate, answered 408; shutdown: cut at shutdown; buffer_full: too many bodies in memory).",
		}, []string{"endpoint", "reason"}),
		maintenanceSuccess: f.NewGauge(prometheus.GaugeOpts{
			Name: "classwatch_collector_maintenance_last_success_timestamp_seconds",
			Help: "When the maintenance jobs last completed without error, in Unix seconds.",
		}),
	}, nil
}

// initModel creates the zero series of a newly registered model, every
// label result included, so rates and absent() behave from the start.
func (m *metrics) initModel(model string) {
	m.predictionsReceived.WithLabelValues(model)
	m.purged.WithLabelValues(model)
	results := [...]string{
		store.LabelMatched.String(), store.LabelEarly.String(), store.LabelDuplicate.String(),
		store.LabelCorrected.String(), resultImplied, resultExpired, resultRejected,
	}
	for _, r := range results {
		m.labelsReceived.WithLabelValues(model, r)
	}
}

// Results of classwatch_source_lines_total.
const (
	lineAccepted  = "accepted"
	lineDuplicate = "duplicate"
	lineRejected  = "rejected"
)

// sourceLines counts one committed batch's line outcomes for its source.
func (m *metrics) sourceLines(source, kind string, accepted, duplicates, rejected int) {
	for _, o := range [...]struct {
		result string
		n      int
	}{{lineAccepted, accepted}, {lineDuplicate, duplicates}, {lineRejected, rejected}} {
		if o.n > 0 {
			m.sourceLinesTotal.WithLabelValues(source, kind, o.result).Add(float64(o.n))
		}
	}
}
