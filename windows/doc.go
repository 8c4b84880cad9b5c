// Package windows holds classwatch's arithmetic: the confusion matrix, the
// metrics and confidence intervals computed from it, bucket and window
// bounds, and the rolling per-window state exported to Prometheus.
//
// Every window metric is defined once, in MetricDefs: its name in the JSON
// API, the audit formats and alert rules, its Prometheus family and help,
// its scope (per window or per class), its range and interval, and how it
// is read from Metrics. The exporter, the API, the audit report and the
// rules all iterate that table.
//
// Everything here except the rolling state is a pure function of its
// arguments: no I/O and no clock. The watermark and "now" arrive as
// parameters, so a figure is reproducible from the counts that produced it.
package windows
