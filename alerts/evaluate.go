package alerts

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// Env is what one evaluation of a set of rules shares.
type Env struct {
	Source Source
	// Models are the models known at the evaluation (the store's list).
	Models []store.ModelInfo
	// At is the scheduled time of the evaluation.
	At time.Time
	// Confidence is the level of rules that set none.
	Confidence float64
	// Since is when the evaluator started (see Input.Since).
	Since time.Time
}

// Evaluate evaluates the rule for every model it covers and returns the
// findings and the models it could read. A model of an all-models rule
// whose window is missing is skipped, and its alerts keep their state. An
// error means the rule could not be evaluated at all; its instances keep
// their state.
func (c *Compiled) Evaluate(ctx context.Context, env Env) ([]Finding, map[string]bool, error) {
	var models []store.ModelInfo
	for _, mi := range env.Models {
		if c.Model == AllModels || c.Model == mi.Name {
			models = append(models, mi)
		}
	}
	if c.Model != AllModels && len(models) == 0 {
		return nil, nil, fmt.Errorf("model %s is not known to the store", c.Model)
	}
	conf := c.Confidence
	if conf == 0 {
		conf = env.Confidence
	}
	var out []Finding
	read := make(map[string]bool, len(models))
	for _, mi := range models {
		fs, err := c.eval.Evaluate(ctx, Input{Source: env.Source, Model: mi, At: env.At, Confidence: conf, Since: env.Since})
		if errors.Is(err, ErrNoWindow) && c.Model == AllModels {
			continue
		}
		if err != nil {
			return nil, nil, fmt.Errorf("model %s: %w", mi.Name, err)
		}
		out = append(out, fs...)
		read[mi.Name] = true
	}
	return out, read, nil
}

// view reads the model's window from the source.
func view(in Input, window string) (windows.View, error) {
	v, ok := in.Source.View(in.Model.Name, window)
	if !ok {
		return windows.View{}, fmt.Errorf("window %s: %w", window, ErrNoWindow)
	}
	return v, nil
}

// period is a matrix, predicted-class counts and score aggregates (nil
// when unknown) over [from, to).
type period struct {
	from, to time.Time
	m        *windows.Matrix
	pred     []int64
	scores   *windows.ScoreSums
}

// periods reads the rule's window and its reference period, aligned to
// the same classes.
func periods(ctx context.Context, in Input, r *Rule) (cur, ref period, err error) {
	v, err := view(in, r.Window)
	if err != nil {
		return period{}, period{}, err
	}
	cur = period{from: v.From, to: v.To, m: v.Matrix, pred: v.Predicted, scores: v.Scores}
	ref, err = reference(ctx, in, r, &cur)
	if err != nil {
		return period{}, period{}, fmt.Errorf("read reference %s: %w", r.Reference, err)
	}
	return cur, ref, nil
}

// classPeriods is periods with the positions of the rule's classes.
func classPeriods(ctx context.Context, in Input, r *Rule) (cur, ref period, idx []int, err error) {
	if cur, ref, err = periods(ctx, in, r); err != nil {
		return period{}, period{}, nil, err
	}
	idx, err = classIndexes(r, in.Model.Name, cur.m.Classes())
	return cur, ref, idx, err
}

// reference returns the rule's reference period for the model, aligned
// with cur's classes (cur may be grown to the reference's). Buckets the
// current period also covers are left out of the reference, so that the
// two samples are independent: a window holding the current one is read
// minus the current one; a fixed range is read around it.
func reference(ctx context.Context, in Input, r *Rule, cur *period) (period, error) {
	ref := r.Reference
	if ref.Window != "" {
		v, err := view(in, ref.Window)
		if err != nil {
			return period{}, err
		}
		p := period{from: v.From, to: v.To, m: v.Matrix, pred: v.Predicted, scores: v.Scores}
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
		p.scores = subScores(p.scores, cur.scores)
		return p, nil
	}
	classes := in.Model.Classes
	p := period{from: ref.From, to: ref.To, m: windows.NewMatrix(classes), pred: make([]int64, len(classes)), scores: windows.NewScoreSums(len(classes))}
	pieces := [][2]time.Time{{ref.From, ref.To}}
	if overlaps(p, *cur) {
		pieces = [][2]time.Time{{ref.From, minTime(ref.To, cur.from)}, {maxTime(ref.From, cur.to), ref.To}}
	}
	for _, pc := range pieces {
		if !pc[0].Before(pc[1]) {
			continue
		}
		counts, err := in.Source.Counts(ctx, store.Query{Model: in.Model.Name, From: pc[0], To: pc[1]})
		if err != nil {
			return period{}, err
		}
		pm, pp, err := windows.FromCounts(classes, counts)
		if err != nil {
			return period{}, err
		}
		if err := p.m.Merge(pm); err != nil {
			return period{}, err
		}
		for i := range pp {
			p.pred[i] += pp[i]
		}
		ps, err := windows.ScoresFromCounts(classes, counts)
		if err != nil {
			return period{}, err
		}
		p.scores = addScores(p.scores, ps, 1)
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
	if short.scores != nil {
		short.scores = addScores(windows.NewScoreSums(len(long.pred)), short.scores, 1)
	}
	return nil
}

// addScores returns a + sign·b as new sums over a's classes (b may have
// fewer); nil when either is unknown.
func addScores(a, b *windows.ScoreSums, sign int64) *windows.ScoreSums {
	if a == nil || b == nil {
		return nil
	}
	out := windows.NewScoreSums(len(a.Hist))
	copy(out.Hist, a.Hist)
	out.Calib, out.BrierN, out.BrierSum = a.Calib, a.BrierN, a.BrierSum
	for k := range min(len(a.Hist), len(b.Hist)) {
		for bin := range out.Hist[k] {
			out.Hist[k][bin] += sign * b.Hist[k][bin]
		}
	}
	for bin := range out.Calib {
		out.Calib[bin].N += sign * b.Calib[bin].N
		out.Calib[bin].ScoreSum += float64(sign) * b.Calib[bin].ScoreSum
		out.Calib[bin].Correct += sign * b.Calib[bin].Correct
	}
	out.BrierN += sign * b.BrierN
	out.BrierSum += float64(sign) * b.BrierSum
	return out
}

// subScores returns a − b, the reference's sums without the current
// period's.
func subScores(a, b *windows.ScoreSums) *windows.ScoreSums { return addScores(a, b, -1) }

// classIndexes returns the positions of the rule's classes in classes, or
// all positions when the rule names none. A named class the model lacks is
// an error for a rule on one model and skipped for a rule on all models.
func classIndexes(r *Rule, model string, classes []string) ([]int, error) {
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

// cachedCounts is a Source that reads each fixed range of one model once
// per evaluation, however many rules compare with it.
type cachedCounts struct {
	Source
	ranges map[rangeKey]store.Counts
}

type rangeKey struct {
	model    string
	from, to int64
}

func newCachedCounts(s Source) *cachedCounts {
	return &cachedCounts{Source: s, ranges: make(map[rangeKey]store.Counts)}
}

// Counts reads the range from the underlying source once.
func (c *cachedCounts) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	if q.Segment != nil {
		return c.Source.Counts(ctx, q)
	}
	key := rangeKey{q.Model, q.From.UnixNano(), q.To.UnixNano()}
	if got, ok := c.ranges[key]; ok {
		return got, nil
	}
	got, err := c.Source.Counts(ctx, q)
	if err != nil {
		return store.Counts{}, err
	}
	c.ranges[key] = got
	return got, nil
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
