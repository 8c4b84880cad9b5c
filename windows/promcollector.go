package windows

import (
	"slices"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// promCollector exports a Tracker's windows. Every series is built at scrape
// time from the tracker's current views, so a series whose figure becomes
// undefined, or a class or window that goes away, leaves nothing stale.
type promCollector struct {
	t          *Tracker
	confidence float64

	watermark     *prometheus.Desc
	windowStart   *prometheus.Desc
	windowEnd     *prometheus.Desc
	predictions   *prometheus.Desc
	labeled       *prometheus.Desc
	coverage      *prometheus.Desc
	accuracy      *prometheus.Desc
	balanced      *prometheus.Desc
	macroF1       *prometheus.Desc
	confusion     *prometheus.Desc
	classPredicts *prometheus.Desc
	recall        *prometheus.Desc
	recallLower   *prometheus.Desc
	recallUpper   *prometheus.Desc
	precision     *prometheus.Desc
	specificity   *prometheus.Desc
	f1            *prometheus.Desc
	prevalence    *prometheus.Desc
	predicted     *prometheus.Desc
}

// NewCollector returns a Prometheus collector of t's windows, with
// confidence intervals at the given level (0.95 for 95%). The caller
// registers it on its own registry.
func NewCollector(t *Tracker, confidence float64) prometheus.Collector {
	win := []string{"model", "window"}
	class := []string{"model", "window", "class"}
	d := func(name, help string, labels []string) *prometheus.Desc {
		return prometheus.NewDesc(name, help, labels, nil)
	}
	return &promCollector{
		t:          t,
		confidence: confidence,

		watermark:     d("classwatch_watermark_timestamp_seconds", "End of the bucket that holds the model's latest prediction time (or the current time under the wall clock), in Unix seconds; windows end here less their lag.", []string{"model"}),
		windowStart:   d("classwatch_window_start_timestamp_seconds", "Start of the window's first bucket, in Unix seconds.", win),
		windowEnd:     d("classwatch_window_end_timestamp_seconds", "End of the window's last bucket (exclusive), in Unix seconds.", win),
		predictions:   d("classwatch_window_predictions", "Predictions made in the window, labeled or not.", win),
		labeled:       d("classwatch_window_labeled", "Predictions made in the window that have a label.", win),
		coverage:      d("classwatch_label_coverage_ratio", "Labeled predictions over all predictions in the window.", win),
		accuracy:      d("classwatch_accuracy_ratio", "Correct predictions over labeled predictions in the window.", win),
		balanced:      d("classwatch_balanced_accuracy_ratio", "Mean recall over the classes with at least one labeled example in the window.", win),
		macroF1:       d("classwatch_macro_f1_ratio", "Mean F1 over the classes present among the window's actual or predicted classes.", win),
		confusion:     d("classwatch_confusion", "Labeled predictions in the window by actual and predicted class.", []string{"model", "window", "actual", "predicted"}),
		classPredicts: d("classwatch_window_class_predictions", "Predictions of the class made in the window, labeled or not.", class),
		recall:        d("classwatch_recall_ratio", "Recall of the class in the window: true positives over labeled examples of the class.", class),
		recallLower:   d("classwatch_recall_lower_ratio", "Lower bound of the Wilson score interval of the class's recall.", class),
		recallUpper:   d("classwatch_recall_upper_ratio", "Upper bound of the Wilson score interval of the class's recall.", class),
		precision:     d("classwatch_precision_ratio", "Precision of the class in the window: true positives over labeled predictions of the class.", class),
		specificity:   d("classwatch_specificity_ratio", "Specificity of the class in the window: true negatives over labeled examples of other classes.", class),
		f1:            d("classwatch_f1_ratio", "F1 score of the class in the window.", class),
		prevalence:    d("classwatch_prevalence_ratio", "Labeled examples of the class over all labeled predictions in the window.", class),
		predicted:     d("classwatch_predicted_ratio", "Predictions of the class over all predictions in the window, labeled or not.", class),
	}
}

// Describe sends every descriptor the collector uses.
func (c *promCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{
		c.watermark, c.windowStart, c.windowEnd, c.predictions, c.labeled,
		c.coverage, c.accuracy, c.balanced, c.macroF1, c.confusion,
		c.classPredicts, c.recall, c.recallLower, c.recallUpper, c.precision,
		c.specificity, c.f1, c.prevalence, c.predicted,
	} {
		ch <- d
	}
}

// Collect builds every series from the tracker's current views. Undefined
// ratios are left out; counts are always sent, zeros included.
//
// The registry sorts each family's series by label values. Sending them in
// that order already (labels sorted by name, series by values) lets its
// sort finish in one pass; unsorted, sorting is a quarter of a large
// scrape's cost.
func (c *promCollector) Collect(ch chan<- prometheus.Metric) {
	models, samples := c.snapshot()
	b := newSampleBatch(samples, 4*samples)
	send := func(d *prometheus.Desc, v float64, labels ...*dto.LabelPair) {
		ch <- b.add(d, v, labels...)
	}
	for _, mf := range models {
		if !mf.watermark.IsZero() {
			send(c.watermark, unixSeconds(mf.watermark), mf.pair)
		}
	}

	// {model, window} families.
	perWindow := func(d *prometheus.Desc, value func(vf *viewFigures) (float64, bool)) {
		for _, mf := range models {
			for i := range mf.views {
				if v, ok := value(&mf.views[i]); ok {
					send(d, v, mf.pair, mf.views[i].pair)
				}
			}
		}
	}
	perWindow(c.windowStart, func(vf *viewFigures) (float64, bool) {
		return unixSeconds(vf.v.From), !vf.v.Watermark.IsZero()
	})
	perWindow(c.windowEnd, func(vf *viewFigures) (float64, bool) {
		return unixSeconds(vf.v.To), !vf.v.Watermark.IsZero()
	})
	perWindow(c.predictions, func(vf *viewFigures) (float64, bool) { return float64(vf.m.Predictions), true })
	perWindow(c.labeled, func(vf *viewFigures) (float64, bool) { return float64(vf.m.Labeled), true })
	perWindow(c.coverage, func(vf *viewFigures) (float64, bool) { return deref(vf.m.LabelCoverage) })
	perWindow(c.accuracy, func(vf *viewFigures) (float64, bool) { return deref(vf.m.Accuracy) })
	perWindow(c.balanced, func(vf *viewFigures) (float64, bool) { return deref(vf.m.BalancedAccuracy) })
	perWindow(c.macroF1, func(vf *viewFigures) (float64, bool) { return deref(vf.m.MacroF1) })

	// {class, model, window} families.
	refs := classRefs(models)
	perClass := func(d *prometheus.Desc, value func(cm *ClassMetrics) (float64, bool)) {
		for _, r := range refs {
			mf := &models[r.model]
			for i := range mf.views {
				if v, ok := value(&mf.views[i].m.PerClass[r.index]); ok {
					send(d, v, mf.class[r.index], mf.pair, mf.views[i].pair)
				}
			}
		}
	}
	perClass(c.classPredicts, func(cm *ClassMetrics) (float64, bool) { return float64(cm.PredictedCount), true })
	perClass(c.recall, func(cm *ClassMetrics) (float64, bool) { return deref(cm.Recall) })
	perClass(c.recallLower, func(cm *ClassMetrics) (float64, bool) {
		if cm.RecallInterval == nil {
			return 0, false
		}
		return cm.RecallInterval.Lo, true
	})
	perClass(c.recallUpper, func(cm *ClassMetrics) (float64, bool) {
		if cm.RecallInterval == nil {
			return 0, false
		}
		return cm.RecallInterval.Hi, true
	})
	perClass(c.precision, func(cm *ClassMetrics) (float64, bool) { return deref(cm.Precision) })
	perClass(c.specificity, func(cm *ClassMetrics) (float64, bool) { return deref(cm.Specificity) })
	perClass(c.f1, func(cm *ClassMetrics) (float64, bool) { return deref(cm.F1) })
	perClass(c.prevalence, func(cm *ClassMetrics) (float64, bool) { return deref(cm.Prevalence) })
	perClass(c.predicted, func(cm *ClassMetrics) (float64, bool) { return deref(cm.PredictedShare) })

	// {actual, model, predicted, window}: every cell, zeros included.
	for _, r := range refs {
		mf := &models[r.model]
		for _, p := range mf.byName {
			for i := range mf.views {
				send(c.confusion, float64(mf.views[i].v.Matrix.At(r.index, p)), mf.actual[r.index], mf.pair, mf.predicted[p], mf.views[i].pair)
			}
		}
	}
}

// modelFigures are one model's views and metrics at scrape time.
type modelFigures struct {
	pair      *dto.LabelPair
	watermark time.Time
	// views are sorted by window name; all share one class list.
	views []viewFigures
	// class, actual and predicted are label pairs per class index.
	class, actual, predicted []*dto.LabelPair
	// byName lists class indices in class-name order.
	byName []int
}

type viewFigures struct {
	v    View
	m    Metrics
	pair *dto.LabelPair
}

// snapshot reads every model's views, sorted by model then window name,
// computes their metrics, and counts the samples they can give at most.
func (c *promCollector) snapshot() (models []modelFigures, samples int) {
	for _, name := range c.t.Models() {
		views := c.t.Views(name)
		wm, _ := c.t.Watermark(name)
		slices.SortFunc(views, func(a, b View) int { return strings.Compare(a.Window.Name, b.Window.Name) })
		mf := modelFigures{pair: labelPair("model", name), watermark: wm, views: make([]viewFigures, len(views))}
		for i, v := range views {
			mf.views[i] = viewFigures{v: v, m: v.Metrics(c.confidence), pair: labelPair("window", v.Window.Name)}
		}
		var classes []string
		if len(views) > 0 {
			classes = views[0].Matrix.Classes()
		}
		n := len(classes)
		mf.class, mf.actual, mf.predicted = make([]*dto.LabelPair, n), make([]*dto.LabelPair, n), make([]*dto.LabelPair, n)
		mf.byName = make([]int, n)
		for k, cl := range classes {
			mf.class[k], mf.actual[k], mf.predicted[k] = labelPair("class", cl), labelPair("actual", cl), labelPair("predicted", cl)
			mf.byName[k] = k
		}
		slices.SortFunc(mf.byName, func(a, b int) int { return strings.Compare(classes[a], classes[b]) })
		// Per window: 8 window series, n² cells and 9 series per class.
		samples += 1 + len(views)*(8+n*n+9*n)
		models = append(models, mf)
	}
	return models, samples
}

// classRef is one class of one model.
type classRef struct {
	model int // index in the models slice
	index int // class index in the model's matrices
	name  string
}

// classRefs lists every model's classes ordered by class name, then model
// (models are sorted by name already).
func classRefs(models []modelFigures) []classRef {
	var refs []classRef
	for i, mf := range models {
		for _, k := range mf.byName {
			refs = append(refs, classRef{model: i, index: k, name: mf.class[k].GetValue()})
		}
	}
	slices.SortStableFunc(refs, func(a, b classRef) int { return strings.Compare(a.name, b.name) })
	return refs
}

func deref(v *float64) (float64, bool) {
	if v == nil {
		return 0, false
	}
	return *v, true
}

func labelPair(name, value string) *dto.LabelPair {
	return &dto.LabelPair{Name: &name, Value: &value}
}

// sample is one gauge sample of a scrape. A scrape of 50 models × 12
// classes × 4 windows sends about 52,000 samples; prometheus.MustNewConstMetric
// would allocate and sort label pairs for each, so samples are instead cut
// from one batch per scrape and share their label pairs, which nothing
// downstream modifies.
type sample struct {
	desc *prometheus.Desc
	// labels are sorted by name, as the registry expects.
	labels []*dto.LabelPair
	value  float64
	gauge  dto.Gauge
}

// Desc returns the sample's descriptor.
func (s *sample) Desc() *prometheus.Desc { return s.desc }

// Write fills out with the sample's labels and gauge value.
func (s *sample) Write(out *dto.Metric) error {
	out.Label = s.labels
	out.Gauge = &s.gauge
	return nil
}

// sampleBatch hands out samples and label slices from preallocated arrays.
// Its capacities must cover what is added: a sample handed out is never
// moved.
type sampleBatch struct {
	samples []sample
	labels  []*dto.LabelPair
}

func newSampleBatch(samples, labels int) *sampleBatch {
	return &sampleBatch{samples: make([]sample, 0, samples), labels: make([]*dto.LabelPair, 0, labels)}
}

// add returns a new sample; labels must be sorted by name.
func (b *sampleBatch) add(d *prometheus.Desc, v float64, labels ...*dto.LabelPair) *sample {
	start := len(b.labels)
	b.labels = append(b.labels, labels...)
	b.samples = b.samples[:len(b.samples)+1]
	s := &b.samples[len(b.samples)-1]
	s.desc, s.value, s.labels = d, v, b.labels[start:len(b.labels):len(b.labels)]
	s.gauge.Value = &s.value
	return s
}

// unixSeconds returns t as fractional Unix seconds.
func unixSeconds(t time.Time) float64 {
	return float64(t.UnixNano()) / 1e9
}
