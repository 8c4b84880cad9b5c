package alerts

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// psiEpsilon replaces the share of an empty class in PSI.
const psiEpsilon = 1e-4

// minExpected is the least expected count per category of a chi-square or
// G test; sparser categories are pooled first. Cochran's rule of thumb
// (common practice): the chi-square approximation is poor below about 5.
const minExpected = 5

// errNoWindow: the window source does not know the model's window.
var errNoWindow = errors.New("window unknown to the window source")

// finding is one instance's result of one evaluation.
type finding struct {
	model, class, predicted string
	result                  Result
}

// evalEnv holds the reads one evaluation shares across rules.
type evalEnv struct {
	at     time.Time
	models []store.ModelInfo
	// ranges caches fixed-range reference counts by model and range.
	ranges map[rangeKey]store.Counts
}

type rangeKey struct {
	model    string
	from, to int64
}

// period is a matrix and predicted-class counts over [from, to).
type period struct {
	from, to time.Time
	m        *windows.Matrix
	pred     []int64
}

// evalRule evaluates r for every model it covers and returns the findings
// and the models it could read. A model of an all-models rule whose window
// is missing is skipped, and its alerts keep their state. An error means
// the rule could not be evaluated at all; its instances keep their state.
func (m *Manager) evalRule(ctx context.Context, env *evalEnv, r *rule) ([]finding, map[string]bool, error) {
	var models []store.ModelInfo
	for _, mi := range env.models {
		if r.Model == AllModels || r.Model == mi.Name {
			models = append(models, mi)
		}
	}
	if r.Model != AllModels && len(models) == 0 {
		return nil, nil, fmt.Errorf("model %s is not known to the store", r.Model)
	}
	conf := r.Confidence
	if conf == 0 {
		conf = m.confidence
	}
	var out []finding
	read := make(map[string]bool, len(models))
	for _, mi := range models {
		if r.Kind == KindSilence {
			out = append(out, m.silence(r, mi, env.at))
			read[mi.Name] = true
			continue
		}
		v, ok := m.view(mi.Name, r.Window)
		if !ok {
			if r.Model == AllModels {
				continue
			}
			return nil, nil, fmt.Errorf("no window %s for model %s", r.Window, mi.Name)
		}
		cur := period{from: v.From, to: v.To, m: v.Matrix, pred: v.Predicted}
		var (
			fs  []finding
			err error
		)
		switch r.Kind {
		case KindFloor, KindCeiling:
			fs, err = bound(r, mi.Name, v, conf)
		default:
			var ref period
			ref, err = m.reference(ctx, env, r, mi, &cur)
			if errors.Is(err, errNoWindow) && r.Model == AllModels {
				continue
			}
			if err != nil {
				return nil, nil, fmt.Errorf("model %s: read reference %s: %w", mi.Name, r.Reference, err)
			}
			switch r.Kind {
			case KindDrop:
				fs, err = drop(r, mi.Name, cur, ref, conf)
			case KindConfusionRise:
				fs, err = confusionRise(r, mi.Name, cur, ref, conf)
			default:
				fs, err = shift(r, mi.Name, cur, ref, conf)
			}
		}
		if err != nil {
			return nil, nil, fmt.Errorf("model %s: %w", mi.Name, err)
		}
		out = append(out, fs...)
		read[mi.Name] = true
	}
	return out, read, nil
}

// classIndexes returns the positions of the rule's classes in classes, or
// all positions when the rule names none. A named class the model lacks is
// an error for a rule on one model and skipped for a rule on all models.
func classIndexes(r *rule, model string, classes []string) ([]int, error) {
	if len(r.Classes) == 0 {
		idx := make([]int, len(classes))
		for i := range idx {
			idx[i] = i
		}
		return idx, nil
	}
	var idx []int
	for _, c := range r.Classes {
		i := slices.Index(classes, c)
		if i < 0 {
			if r.Model == AllModels {
				continue
			}
			return nil, fmt.Errorf("class %s is not a class of model %s", c, model)
		}
		idx = append(idx, i)
	}
	return idx, nil
}

// bound evaluates a floor or ceiling rule: it fires only when the whole
// interval lies beyond the threshold.
func bound(r *rule, model string, v windows.View, conf float64) ([]finding, error) {
	classes := v.Matrix.Classes()
	idx := []int{-1}
	if r.metric.perClass {
		var err error
		if idx, err = classIndexes(r, model, classes); err != nil {
			return nil, err
		}
	}
	var ms windows.Metrics
	if r.metric.value != nil {
		ms = v.Metrics(conf)
	}
	beyond := func(x float64) bool {
		if r.Kind == KindFloor {
			return x < r.Threshold
		}
		return x > r.Threshold
	}
	out := make([]finding, 0, len(idx))
	for _, k := range idx {
		f := finding{model: model}
		if k >= 0 {
			f.class = classes[k]
		}
		res := Result{From: v.From, To: v.To, Threshold: ptr(r.Threshold), Confidence: conf}
		if r.metric.counts != nil {
			x, n := r.metric.counts(v.Matrix, v.Predicted, k)
			res.Count = n
			if n < r.MinCount {
				f.result = unknown(res, "n=%d is below min_count %d", n, r.MinCount)
				out = append(out, f)
				continue
			}
			value := float64(x) / float64(n)
			res.Value = &value
			if r.Interval == IntervalNone {
				res.Outcome = outcome(beyond(value))
			} else {
				lo, hi, ok := interval(r.Interval, x, n, conf)
				if !ok {
					f.result = unknown(res, "no interval for %d of %d", x, n)
					out = append(out, f)
					continue
				}
				res.Interval = &[2]float64{lo, hi}
				// The whole interval must lie beyond the threshold: the
				// upper bound below a floor, the lower bound above a ceiling.
				edge := hi
				if r.Kind == KindCeiling {
					edge = lo
				}
				res.Outcome = outcome(beyond(edge))
			}
		} else {
			value, n := r.metric.value(ms, v.Matrix, max(k, 0))
			res.Count = n
			switch {
			case n < r.MinCount:
				f.result = unknown(res, "n=%d is below min_count %d", n, r.MinCount)
				out = append(out, f)
				continue
			case value == nil:
				f.result = unknown(res, "%s is undefined", r.Metric)
				out = append(out, f)
				continue
			}
			res.Value = value
			res.Outcome = outcome(beyond(*value))
		}
		f.result = res
		out = append(out, f)
	}
	return out, nil
}

func interval(method string, x, n int64, conf float64) (lo, hi float64, ok bool) {
	if method == IntervalJeffreys {
		return stats.Jeffreys(x, n, conf)
	}
	return stats.Wilson(x, n, conf)
}

// comparison is one instance of a drop or confusion_rise rule before the
// Benjamini–Hochberg step.
type comparison struct {
	finding
	p float64
}

// drop evaluates a drop rule: per class, is the current figure lower than
// the reference's by more than the margin?
func drop(r *rule, model string, cur, ref period, conf float64) ([]finding, error) {
	classes := cur.m.Classes()
	idx, err := classIndexes(r, model, classes)
	if err != nil {
		return nil, err
	}
	var cs []comparison
	for _, k := range idx {
		x1, n1 := r.metric.counts(cur.m, cur.pred, k)
		x2, n2 := r.metric.counts(ref.m, ref.pred, k)
		c, err := compareOne(r, cur, ref, proportion{x1, n1}, proportion{x2, n2}, conf, true)
		if err != nil {
			return nil, fmt.Errorf("class %s: %w", classes[k], err)
		}
		c.model, c.class = model, classes[k]
		cs = append(cs, c)
	}
	return adjust(cs, conf), nil
}

// confusionRise evaluates a confusion_rise rule: per (actual, predicted)
// pair, did the share of actual predicted as predicted rise by more than
// the margin?
func confusionRise(r *rule, model string, cur, ref period, conf float64) ([]finding, error) {
	classes := cur.m.Classes()
	type pair struct{ a, p int }
	var pairs []pair
	if len(r.Pairs) == 0 {
		for a := range classes {
			for p := range classes {
				if a != p {
					pairs = append(pairs, pair{a, p})
				}
			}
		}
	}
	for _, pr := range r.Pairs {
		a, p := slices.Index(classes, pr.Actual), slices.Index(classes, pr.Predicted)
		if a < 0 || p < 0 {
			if r.Model == AllModels {
				continue
			}
			return nil, fmt.Errorf("pair %s→%s names a class model %s lacks", pr.Actual, pr.Predicted, model)
		}
		pairs = append(pairs, pair{a, p})
	}
	var cs []comparison
	for _, pr := range pairs {
		x1, n1 := cur.m.At(pr.a, pr.p), cur.m.Row(pr.a)
		x2, n2 := ref.m.At(pr.a, pr.p), ref.m.Row(pr.a)
		c, err := compareOne(r, cur, ref, proportion{x1, n1}, proportion{x2, n2}, conf, false)
		if err != nil {
			return nil, fmt.Errorf("pair %s→%s: %w", classes[pr.a], classes[pr.p], err)
		}
		c.model, c.class, c.predicted = model, classes[pr.a], classes[pr.p]
		cs = append(cs, c)
	}
	return adjust(cs, conf), nil
}

// compareOne builds one comparison's result; an instance below the
// minimum count gets an unknown outcome and p = NaN.
func compareOne(r *rule, cur, ref period, c, b proportion, conf float64, lower bool) (comparison, error) {
	res := Result{
		From: cur.from, To: cur.to, Count: c.n, Confidence: conf, Margin: ptr(r.Margin),
		Reference: &Figures{From: ref.from, To: ref.to, Count: b.n},
	}
	if c.n > 0 {
		res.Value = ptr(c.value())
	}
	if b.n > 0 {
		res.Reference.Value = ptr(b.value())
	}
	if c.n < r.MinCount || b.n < r.MinCount {
		return comparison{finding: finding{result: unknown(res, "n=%d now and %d in the reference; min_count is %d", c.n, b.n, r.MinCount)}, p: math.NaN()}, nil
	}
	cmpr, p, err := compare(c, b, r.Margin, conf, lower)
	if err != nil {
		return comparison{}, err
	}
	lo, hi, _ := stats.Wilson(c.x, c.n, conf)
	res.Interval = &[2]float64{lo, hi}
	res.Difference = ptr(cmpr.Diff)
	res.DifferenceInterval = &[2]float64{cmpr.Lo, cmpr.Hi}
	res.PValue = ptr(p)
	return comparison{finding: finding{result: res}, p: p}, nil
}

// adjust decides the comparisons of one rule and model together with the
// Benjamini–Hochberg procedure at q = 1 − confidence; unknown ones (p NaN)
// are left out of the family.
func adjust(cs []comparison, conf float64) []finding {
	ps := make([]float64, 0, len(cs))
	judged := make([]int, 0, len(cs))
	for i, c := range cs {
		if c.result.Outcome != OutcomeUnknown {
			ps = append(ps, c.p)
			judged = append(judged, i)
		}
	}
	reject := stats.BenjaminiHochberg(ps, 1-conf)
	for j, i := range judged {
		cs[i].result.Outcome = outcome(reject[j])
	}
	out := make([]finding, len(cs))
	for i, c := range cs {
		out[i] = c.finding
	}
	return out
}

// shift evaluates a prevalence_shift or output_shift rule.
func shift(r *rule, model string, cur, ref period, conf float64) ([]finding, error) {
	var a, b []int64
	if r.Kind == KindPrevalenceShift {
		a, b = rows(cur.m), rows(ref.m)
	} else {
		a, b = cur.pred, ref.pred
	}
	ta, tb := sum(a), sum(b)
	res := Result{From: cur.from, To: cur.to, Count: ta, Confidence: conf, Reference: &Figures{From: ref.from, To: ref.to, Count: tb}}
	if r.PSIThreshold > 0 {
		res.Threshold = ptr(r.PSIThreshold)
	}
	f := finding{model: model}
	if ta < r.MinCount || tb < r.MinCount {
		f.result = unknown(res, "n=%d now and %d in the reference; min_count is %d", ta, tb, r.MinCount)
		return []finding{f}, nil
	}
	psi, err := stats.PSI(b, a, psiEpsilon)
	if err != nil {
		return nil, err
	}
	res.PSI, res.Value = ptr(psi), ptr(psi)
	met := r.PSIThreshold == 0 || psi >= r.PSIThreshold
	if r.Test != TestNone {
		pa, pb := poolSparse(a, b)
		test := stats.ChiSquare
		if r.Test == TestG {
			test = stats.GTest
		}
		t, err := test(pa, pb)
		if err != nil {
			return nil, err
		}
		res.Statistic, res.DF, res.PValue = ptr(t.Statistic), ptr(t.DF), ptr(t.P)
		met = met && t.P <= 1-conf
	}
	res.Outcome = outcome(met)
	f.result = res
	return []finding{f}, nil
}

// poolSparse merges the categories whose expected count in either sample
// would fall below minExpected into one pooled category, so that the
// chi-square approximation holds; when the pool itself stays that sparse
// it is merged into the largest remaining category.
func poolSparse(a, b []int64) ([]int64, []int64) {
	ta, tb := float64(sum(a)), float64(sum(b))
	n := ta + tb
	sparse := func(x, y int64) bool {
		col := float64(x + y)
		return col*min(ta, tb)/n < minExpected
	}
	var pa, pb []int64
	var sa, sb int64
	pooled := false
	for i := range a {
		if a[i]+b[i] > 0 && sparse(a[i], b[i]) {
			sa, sb, pooled = sa+a[i], sb+b[i], true
			continue
		}
		pa, pb = append(pa, a[i]), append(pb, b[i])
	}
	if !pooled {
		return pa, pb
	}
	if !sparse(sa, sb) || len(pa) == 0 {
		return append(pa, sa), append(pb, sb)
	}
	big := 0
	for i := range pa {
		if pa[i]+pb[i] > pa[big]+pb[big] {
			big = i
		}
	}
	pa[big] += sa
	pb[big] += sb
	return pa, pb
}

// silence evaluates a silence rule from the model's latest prediction
// time. A model that never sent one counts as silent since the evaluator
// started.
func (m *Manager) silence(r *rule, mi store.ModelInfo, at time.Time) finding {
	since := mi.LatestAt
	res := Result{Threshold: ptr(r.SilentFor.Seconds())}
	if since.IsZero() {
		since = m.started
	} else {
		res.LastPrediction = ptr(mi.LatestAt)
	}
	quiet := at.Sub(since)
	res.Value = ptr(quiet.Seconds())
	res.Outcome = outcome(quiet >= r.SilentFor)
	return finding{model: mi.Name, result: res}
}

// reference returns the rule's reference period for model, aligned with
// cur's classes (cur may be grown to the reference's). Buckets the current
// period also covers are left out of the reference, so that the two
// samples are independent: a window holding the current one is read
// minus the current one; a fixed range is read around it.
func (m *Manager) reference(ctx context.Context, env *evalEnv, r *rule, mi store.ModelInfo, cur *period) (period, error) {
	ref := r.Reference
	if ref.Window != "" {
		v, ok := m.view(mi.Name, ref.Window)
		if !ok {
			return period{}, errNoWindow
		}
		p := period{from: v.From, to: v.To, m: v.Matrix, pred: v.Predicted}
		if err := align(cur, &p); err != nil {
			return period{}, err
		}
		if !overlaps(p, *cur) {
			return p, nil
		}
		if p.from.After(cur.from) || p.to.Before(cur.to) {
			return period{}, fmt.Errorf("window %s partly overlaps window %s; use windows that nest or do not overlap", ref.Window, r.Window)
		}
		p.m = p.m.Clone()
		if err := p.m.Sub(cur.m); err != nil {
			return period{}, err
		}
		p.pred = slices.Clone(p.pred)
		for i := range p.pred {
			p.pred[i] -= cur.pred[i]
		}
		return p, nil
	}

	p := period{from: ref.From, to: ref.To, m: windows.NewMatrix(mi.Classes), pred: make([]int64, len(mi.Classes))}
	pieces := [][2]time.Time{{ref.From, ref.To}}
	if overlaps(p, *cur) {
		pieces = [][2]time.Time{{ref.From, minTime(ref.To, cur.from)}, {maxTime(ref.From, cur.to), ref.To}}
	}
	for _, pc := range pieces {
		if !pc[0].Before(pc[1]) {
			continue
		}
		key := rangeKey{mi.Name, pc[0].UnixNano(), pc[1].UnixNano()}
		counts, ok := env.ranges[key]
		if !ok {
			var err error
			counts, err = m.store.Counts(ctx, store.Query{Model: mi.Name, From: pc[0], To: pc[1]})
			if err != nil {
				return period{}, err
			}
			env.ranges[key] = counts
		}
		pm, pp, err := windows.FromCounts(mi.Classes, counts)
		if err != nil {
			return period{}, err
		}
		if err := p.m.Merge(pm); err != nil {
			return period{}, err
		}
		for i := range pp {
			p.pred[i] += pp[i]
		}
	}
	return p, align(cur, &p)
}

// align grows whichever of a and b has fewer classes to the other's class
// list; the registry only appends classes, so one list extends the other.
func align(a, b *period) error {
	ca, cb := a.m.Classes(), b.m.Classes()
	if slices.Equal(ca, cb) {
		return nil
	}
	short, long := a, b
	if len(ca) > len(cb) {
		short, long = b, a
	}
	g, err := short.m.Grow(long.m.Classes())
	if err != nil {
		return err
	}
	short.m = g
	short.pred = append(slices.Clone(short.pred), make([]int64, len(long.pred)-len(short.pred))...)
	return nil
}

func overlaps(a, b period) bool {
	return a.from.Before(b.to) && b.from.Before(a.to)
}

func minTime(a, b time.Time) time.Time {
	if a.Before(b) {
		return a
	}
	return b
}

func maxTime(a, b time.Time) time.Time {
	if a.After(b) {
		return a
	}
	return b
}

func rows(m *windows.Matrix) []int64 {
	out := make([]int64, m.Len())
	for k := range out {
		out[k] = m.Row(k)
	}
	return out
}

func outcome(met bool) Outcome {
	if met {
		return OutcomeMet
	}
	return OutcomeClear
}

func unknown(res Result, format string, args ...any) Result {
	res.Outcome = OutcomeUnknown
	res.Reason = fmt.Sprintf(format, args...)
	return res
}
