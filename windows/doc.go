// Package windows holds classwatch's arithmetic: the confusion matrix, the
// metrics and confidence intervals computed from it, bucket and window
// bounds, and the rolling per-window state exported to Prometheus.
//
// Everything here except the rolling state is a pure function of its
// arguments: no I/O and no clock. The watermark and "now" arrive as
// parameters, so a figure is reproducible from the counts that produced it.
package windows
