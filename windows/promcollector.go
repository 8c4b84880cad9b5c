package windows

import (
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// promGatherer exports a Tracker's windows. Every series is built at scrape
// time from the tracker's current views, so a series whose figure becomes
// undefined, or a class or window that goes away, leaves nothing stale.
//
// It builds the metric families itself instead of going through a
// prometheus.Registry: a scrape of 50 models × 12 classes × 4 windows has
// about 52,000 series, and the registry's per-series checks (label
// validation, hashing for duplicates, sorting) cost more than computing the
// windows. The families are built already in the registry's order (families
// by name, labels by name, series by label values), every label pair is
// valid by construction, and no two series of a family share label values.
type promGatherer struct {
	t          *Tracker
	confidence float64

	watermark     family
	windowStart   family
	windowEnd     family
	predictions   family
	labeled       family
	confusion     family
	classPredicts family
	omitted       family
	// perWindow and perClass are the exported metrics of MetricDefs, with
	// their interval bounds.
	perWindow, perClass []metricFamily
}

// family names one gauge family and its help text.
type family struct {
	name, help string
}

// metricFamily is a family whose value is read from computed figures.
type metricFamily struct {
	family
	value func(ms *Metrics, k int) (float64, bool)
}

// NewGatherer returns a Prometheus gatherer of t's windows, with confidence
// intervals at the given level (0.95 for 95%). Its families are sorted and
// checked as a prometheus.Registry would return them; serve it together
// with the caller's registry through MergeGatherers.
func NewGatherer(t *Tracker, confidence float64) prometheus.Gatherer {
	g := &promGatherer{
		t:          t,
		confidence: confidence,

		watermark:     family{"classwatch_watermark_timestamp_seconds", "End of the bucket that holds the model's latest prediction time (or the current time under the wall clock), in Unix seconds; windows end here less their lag."},
		windowStart:   family{"classwatch_window_start_timestamp_seconds", "Start of the window's first bucket, in Unix seconds."},
		windowEnd:     family{"classwatch_window_end_timestamp_seconds", "End of the window's last bucket (exclusive), in Unix seconds."},
		predictions:   family{"classwatch_window_predictions", "Predictions made in the window, labeled or not."},
		labeled:       family{"classwatch_window_labeled", "Predictions made in the window that have a label."},
		confusion:     family{"classwatch_confusion", "Labeled predictions in the window by actual and predicted class."},
		classPredicts: family{"classwatch_window_class_predictions", "Predictions of the class made in the window, labeled or not."},
		omitted:       family{"classwatch_scrape_omitted_series", "Series of the model left out of this scrape by the series budget (see the windows package documentation); 0 when none."},
	}
	g.perWindow, g.perClass = metricFamilies()
	return g
}

// metricFamilies returns the exported metrics of MetricDefs, each followed
// by its interval bounds when it exports them, by scope.
func metricFamilies() (perWindow, perClass []metricFamily) {
	for _, d := range MetricDefs() {
		if d.Prom == "" {
			continue
		}
		fams := []metricFamily{{family{d.Prom, d.Help}, func(ms *Metrics, k int) (float64, bool) { return deref(d.Value(ms, k)) }}}
		if d.PromBounds != "" {
			bound := func(hi bool) func(ms *Metrics, k int) (float64, bool) {
				return func(ms *Metrics, k int) (float64, bool) {
					iv := d.Interval(ms, k)
					switch {
					case iv == nil:
						return 0, false
					case hi:
						return iv.Hi, true
					}
					return iv.Lo, true
				}
			}
			fams = append(fams,
				metricFamily{family{d.PromLower(), "Lower bound of the " + d.PromBounds + "."}, bound(false)},
				metricFamily{family{d.PromUpper(), "Upper bound of the " + d.PromBounds + "."}, bound(true)})
		}
		if d.Scope == ScopeClass {
			perClass = append(perClass, fams...)
		} else {
			perWindow = append(perWindow, fams...)
		}
	}
	return perWindow, perClass
}

// Gather builds every series from the tracker's current views. Undefined
// ratios are left out; counts are always sent, zeros included, within the
// tracker's series budget (see allocate). Families without a series are
// left out, as a registry leaves them out.
func (g *promGatherer) Gather() ([]*dto.MetricFamily, error) {
	models, samples := g.snapshot()
	allocate(models, g.t.maxSeries)
	b := newFamilyBuilder(samples, 4*samples)
	b.begin(g.omitted)
	for _, mf := range models {
		b.add(float64(mf.omitted), mf.pair)
	}
	b.begin(g.watermark)
	for _, mf := range models {
		if !mf.watermark.IsZero() && mf.level > tierWindow {
			b.add(unixSeconds(mf.watermark), mf.pair)
		}
	}

	// {model, window} families.
	perWindow := func(f family, value func(vf *viewFigures) (float64, bool)) {
		b.begin(f)
		for _, mf := range models {
			if mf.level <= tierWindow {
				continue
			}
			for i := range mf.views {
				if v, ok := value(&mf.views[i]); ok {
					b.add(v, mf.pair, mf.views[i].pair)
				}
			}
		}
	}
	perWindow(g.windowStart, func(vf *viewFigures) (float64, bool) {
		return unixSeconds(vf.v.From), !vf.v.Watermark.IsZero()
	})
	perWindow(g.windowEnd, func(vf *viewFigures) (float64, bool) {
		return unixSeconds(vf.v.To), !vf.v.Watermark.IsZero()
	})
	perWindow(g.predictions, func(vf *viewFigures) (float64, bool) { return float64(vf.m.Predictions), true })
	perWindow(g.labeled, func(vf *viewFigures) (float64, bool) { return float64(vf.m.Labeled), true })
	for _, f := range g.perWindow {
		perWindow(f.family, func(vf *viewFigures) (float64, bool) { return f.value(&vf.m, 0) })
	}

	// {class, model, window} families.
	refs := classRefs(models)
	perClass := func(f family, value func(ms *Metrics, k int) (float64, bool)) {
		b.begin(f)
		for _, r := range refs {
			mf := &models[r.model]
			if mf.level <= tierClass {
				continue
			}
			for i := range mf.views {
				if v, ok := value(&mf.views[i].m, r.index); ok {
					b.add(v, mf.class[r.index], mf.pair, mf.views[i].pair)
				}
			}
		}
	}
	perClass(g.classPredicts, func(ms *Metrics, k int) (float64, bool) { return float64(ms.PerClass[k].PredictedCount), true })
	for _, f := range g.perClass {
		perClass(f.family, f.value)
	}

	// {actual, model, predicted, window}: every cell, zeros included,
	// unless the budget leaves the model's zero cells or all its cells out.
	b.begin(g.confusion)
	for _, r := range refs {
		mf := &models[r.model]
		if mf.level <= tierCells {
			continue
		}
		for _, p := range mf.byName {
			for i := range mf.views {
				if n := mf.views[i].v.Matrix.At(r.index, p); n != 0 || mf.level > tierZeroCells {
					b.add(float64(n), mf.actual[r.index], mf.pair, mf.predicted[p], mf.views[i].pair)
				}
			}
		}
	}
	return b.families(), nil
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
	// tiers counts the model's series per tier; level is how many tiers
	// the series budget lets it export and omitted how many series that
	// leaves out.
	tiers          [numTiers]int
	level, omitted int
}

type viewFigures struct {
	v    View
	m    Metrics
	pair *dto.LabelPair
}

// snapshot reads every model's views, sorted by model then window name,
// computes their metrics, and counts the samples they can give at most.
func (g *promGatherer) snapshot() (models []modelFigures, samples int) {
	for _, name := range g.t.Models() {
		views := g.t.Views(name)
		wm, _ := g.t.Watermark(name)
		slices.SortFunc(views, func(a, b View) int { return strings.Compare(a.Window.Name, b.Window.Name) })
		mf := modelFigures{pair: labelPair("model", name), watermark: wm, views: make([]viewFigures, len(views))}
		for i, v := range views {
			mf.views[i] = viewFigures{v: v, m: v.Metrics(g.confidence), pair: labelPair("window", v.Window.Name)}
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
		g.tierSizes(&mf)
		samples += 1 // omitted
		for _, s := range mf.tiers {
			samples += s
		}
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

// familyBuilder cuts a scrape's families, series, gauges and label slices
// from arrays allocated once per scrape. A scrape of 50 models × 12
// classes × 4 windows has about 52,000 series, which share their label
// pairs; nothing downstream modifies them. The arrays are sized from the
// snapshot's count; should append ever move one, the pointers already
// handed out keep pointing at the old copy, whose values are final.
type familyBuilder struct {
	fams    []*dto.MetricFamily
	gauge   dto.MetricType
	ptrs    []*dto.Metric
	metrics []dto.Metric
	gauges  []dto.Gauge
	values  []float64
	labels  []*dto.LabelPair
	// start is where the current family's series begin in ptrs.
	start int
}

func newFamilyBuilder(samples, labels int) *familyBuilder {
	return &familyBuilder{
		gauge:   dto.MetricType_GAUGE,
		ptrs:    make([]*dto.Metric, 0, samples),
		metrics: make([]dto.Metric, 0, samples),
		gauges:  make([]dto.Gauge, 0, samples),
		values:  make([]float64, 0, samples),
		labels:  make([]*dto.LabelPair, 0, labels),
	}
}

// begin ends the current family and starts a gauge family f.
func (b *familyBuilder) begin(f family) {
	b.end()
	b.fams = append(b.fams, &dto.MetricFamily{Name: &f.name, Help: &f.help, Type: &b.gauge})
}

// end gives the current family the series added since it began.
func (b *familyBuilder) end() {
	if len(b.fams) > 0 {
		b.fams[len(b.fams)-1].Metric = b.ptrs[b.start:len(b.ptrs):len(b.ptrs)]
		b.start = len(b.ptrs)
	}
}

// add adds a series to the current family; labels must be sorted by name,
// and series must come in the order of their label values.
func (b *familyBuilder) add(v float64, labels ...*dto.LabelPair) {
	start := len(b.labels)
	b.labels = append(b.labels, labels...)
	b.values = append(b.values, v)
	b.gauges = append(b.gauges, dto.Gauge{Value: &b.values[len(b.values)-1]})
	b.metrics = append(b.metrics, dto.Metric{Label: b.labels[start:len(b.labels):len(b.labels)], Gauge: &b.gauges[len(b.gauges)-1]})
	b.ptrs = append(b.ptrs, &b.metrics[len(b.metrics)-1])
}

// families returns the non-empty families sorted by name.
func (b *familyBuilder) families() []*dto.MetricFamily {
	b.end()
	fams := slices.DeleteFunc(b.fams, func(mf *dto.MetricFamily) bool { return len(mf.Metric) == 0 })
	slices.SortFunc(fams, func(a, b *dto.MetricFamily) int { return strings.Compare(a.GetName(), b.GetName()) })
	return fams
}

// unixSeconds returns t as fractional Unix seconds.
func unixSeconds(t time.Time) float64 {
	return float64(t.UnixNano()) / 1e9
}

// MergeGatherers returns a gatherer of the families of every gatherer in
// gs, sorted by name. Unlike prometheus.Gatherers it does not check every
// series again, which is most of its cost on a large scrape: each gatherer
// must return checked families (a prometheus.Registry does, and so does
// NewGatherer's), and no two may return the same family name. A family
// name that comes twice is an error, and only its first family is kept.
// Errors of the gatherers are returned with the families they did gather.
func MergeGatherers(gs ...prometheus.Gatherer) prometheus.Gatherer {
	return prometheus.GathererFunc(func() ([]*dto.MetricFamily, error) {
		var (
			all  []*dto.MetricFamily
			errs []error
		)
		for _, g := range gs {
			mfs, err := g.Gather()
			if err != nil {
				errs = append(errs, err)
			}
			all = append(all, mfs...)
		}
		slices.SortStableFunc(all, func(a, b *dto.MetricFamily) int { return strings.Compare(a.GetName(), b.GetName()) })
		all = slices.CompactFunc(all, func(a, b *dto.MetricFamily) bool {
			if a.GetName() != b.GetName() {
				return false
			}
			errs = append(errs, fmt.Errorf("merge families: %s gathered twice", a.GetName()))
			return true
		})
		return all, errors.Join(errs...)
	})
}
