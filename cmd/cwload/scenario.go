package main

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strconv"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// parcelClasses returns the parcel kinds of the fictional warehouse, most
// common first. A scenario uses the first k of them.
func parcelClasses() []string {
	return []string{
		"standard", "fragile", "oversize", "perishable", "return", "hazmat",
		"letter", "pallet", "cold-chain", "high-value", "international", "unreadable",
	}
}

// bucket is the bucket width of every model (the daemon's default).
const bucket = 5 * time.Minute

// accuracy is how often a dock's classifier predicts the parcel's kind.
const accuracy = 0.88

// meanLabelDelay is the mean time until the packing station confirms a
// parcel's kind (an exponential delay).
const meanLabelDelay = 20 * time.Minute

// zone is a share of a model's predictions, spread evenly over the times
// from before end to to before end (from > to).
type zone struct {
	share    float64
	from, to time.Duration
}

// scenario generates the traffic of the parcel classifiers, one model per
// loading dock. Event j of model m depends on (seed, m, j) alone, so every
// phase and representation sees the same events, and the expected window
// figures can be recounted from the generator.
type scenario struct {
	seed    uint64
	models  []string
	classes []string
	// cum is the cumulative prevalence of classes.
	cum []float64
	// perModel is the number of predictions of each model.
	perModel int
	// end is the latest time of any event; zones count back from it.
	end   time.Time
	zones []zone
	// labelFraction of the predictions get a label.
	labelFraction float64
}

// newScenario returns a scenario of models × classes with n predictions per
// model. Class k has prevalence proportional to 1/(k+1)^1.5, so the last
// classes are rare, as the kinds that matter usually are.
func newScenario(seed uint64, prefix string, models, classes, perModel int, end time.Time, zones []zone, labelFraction float64) *scenario {
	s := &scenario{
		seed: seed, classes: parcelClasses()[:classes], perModel: perModel,
		end: end.UTC().Truncate(time.Second), zones: zones, labelFraction: labelFraction,
	}
	for m := range models {
		s.models = append(s.models, fmt.Sprintf("%s-%02d", prefix, m+1))
	}
	var sum float64
	for k := range classes {
		sum += 1 / math.Pow(float64(k+1), 1.5)
		s.cum = append(s.cum, sum)
	}
	for k := range s.cum {
		s.cum[k] /= sum
	}
	return s
}

// event is one parcel: its prediction and, when labeled, its label.
type event struct {
	model, id          string
	at                 time.Time
	actual, predicted  int // class indices
	scores             []float64
	segment            string
	labeled            bool
	labelAt            time.Time
	modelIdx, eventIdx int
}

// event generates event j of model m.
func (s *scenario) event(m, j int) event {
	rng := rand.New(rand.NewPCG(s.seed, uint64(m)<<40|uint64(j)))
	e := event{model: s.models[m], id: "parcel-" + strconv.Itoa(m+1) + "-" + strconv.Itoa(j), modelIdx: m, eventIdx: j}
	e.at = s.timeOf(j, rng)

	e.actual, _ = slices.BinarySearch(s.cum, rng.Float64())
	e.actual = min(e.actual, len(s.classes)-1)
	e.predicted = e.actual
	if rng.Float64() >= accuracy {
		e.predicted = (e.actual + 1 + rng.IntN(len(s.classes)-1)) % len(s.classes)
	}
	// The predicted class scores 0.35 to 0.99; the rest is shared out at
	// random among the other classes. Three decimals, as loggers send them.
	e.scores = make([]float64, len(s.classes))
	top := 0.35 + 0.64*rng.Float64()
	var rest float64
	for k := range e.scores {
		if k != e.predicted {
			e.scores[k] = rng.Float64()
			rest += e.scores[k]
		}
	}
	for k := range e.scores {
		v := top
		if k != e.predicted {
			v = (1 - top) * e.scores[k] / rest
		}
		e.scores[k] = math.Round(v*1000) / 1000
	}
	switch h := e.at.Hour(); {
	case h >= 6 && h < 14:
		e.segment = "early-shift"
	case h >= 14 && h < 22:
		e.segment = "late-shift"
	default:
		e.segment = "night-shift"
	}

	e.labeled = rng.Float64() < s.labelFraction
	if e.labeled {
		delay := time.Duration(rng.ExpFloat64() * float64(meanLabelDelay))
		e.labelAt = e.at.Add(delay).Truncate(time.Microsecond)
		if e.labelAt.After(s.end) {
			e.labelAt = s.end
		}
	}
	return e
}

// timeOf places prediction j: predictions run in time order through the
// zones, evenly within each, with a jitter of up to a second.
func (s *scenario) timeOf(j int, rng *rand.Rand) time.Time {
	pos := (float64(j) + 0.5) / float64(s.perModel)
	var before float64
	for i, z := range s.zones {
		if pos < before+z.share || i == len(s.zones)-1 {
			f := min((pos-before)/z.share, 1)
			ago := z.from - time.Duration(f*float64(z.from-z.to))
			ago -= time.Duration(rng.Int64N(int64(time.Second)))
			return s.end.Add(-max(ago, 0)).Truncate(time.Microsecond)
		}
		before += z.share
	}
	panic("unreachable: the last zone takes every position")
}

// prediction is e as the store receives it from the collector.
func (s *scenario) prediction(e *event) store.Prediction {
	scores := make(map[string]float64, len(e.scores))
	for k, v := range e.scores {
		scores[s.classes[k]] = v
	}
	return store.Prediction{
		Model: e.model, ID: e.id, At: e.at, Bucket: windows.BucketStart(e.at, bucket),
		Predicted: s.classes[e.predicted], Scores: scores, Segment: e.segment,
	}
}

// label is e's label as the store receives it.
func (s *scenario) label(e *event) store.Label {
	return store.Label{Model: e.model, ID: e.id, Actual: s.classes[e.actual], At: e.labelAt}
}

// appendPrediction appends e as one NDJSON line, fields in a fixed order.
// Model, id, class and segment names are plain ASCII, for which Go quoting
// is JSON quoting; scores are printed in the shortest form that parses back
// to the same float64, so the daemon sees exactly the store phase's values.
func (s *scenario) appendPrediction(b []byte, e *event) []byte {
	b = append(b, `{"model":`...)
	b = strconv.AppendQuote(b, e.model)
	b = append(b, `,"id":`...)
	b = strconv.AppendQuote(b, e.id)
	b = append(b, `,"at":"`...)
	b = e.at.AppendFormat(b, time.RFC3339Nano)
	b = append(b, `","predicted":`...)
	b = strconv.AppendQuote(b, s.classes[e.predicted])
	b = append(b, `,"scores":{`...)
	for k, v := range e.scores {
		if k > 0 {
			b = append(b, ',')
		}
		b = strconv.AppendQuote(b, s.classes[k])
		b = append(b, ':')
		b = strconv.AppendFloat(b, v, 'g', -1, 64)
	}
	b = append(b, `},"segment":`...)
	b = strconv.AppendQuote(b, e.segment)
	return append(b, "}\n"...)
}

// appendLabel appends e's label as one NDJSON line.
func (s *scenario) appendLabel(b []byte, e *event) []byte {
	b = append(b, `{"model":`...)
	b = strconv.AppendQuote(b, e.model)
	b = append(b, `,"id":`...)
	b = strconv.AppendQuote(b, e.id)
	b = append(b, `,"actual":`...)
	b = strconv.AppendQuote(b, s.classes[e.actual])
	b = append(b, `,"at":"`...)
	b = e.labelAt.AppendFormat(b, time.RFC3339Nano)
	return append(b, "\"}\n"...)
}

// batchRef is one batch: the events of model `model` listed, in order.
type batchRef struct {
	model int
	list  []int // event indices
}

// predictionBatches cuts each model's predictions, in time order, into
// batches of size lines and interleaves the models' batches, as docks
// pushing side by side would.
func (s *scenario) predictionBatches(size int) []batchRef {
	per := make([][]batchRef, len(s.models))
	for m := range s.models {
		idx := make([]int, s.perModel)
		for j := range idx {
			idx[j] = j
		}
		per[m] = cut(m, idx, size)
	}
	return interleave(per)
}

// labelBatches cuts each model's labels, in the order they become known,
// into batches and interleaves the models' batches.
func (s *scenario) labelBatches(size int) []batchRef {
	per := make([][]batchRef, len(s.models))
	for m := range s.models {
		var idx []int
		var at []time.Time
		for j := range s.perModel {
			if e := s.event(m, j); e.labeled {
				idx = append(idx, j)
				at = append(at, e.labelAt)
			}
		}
		order := make([]int, len(idx))
		for i := range order {
			order[i] = i
		}
		slices.SortStableFunc(order, func(x, y int) int { return at[x].Compare(at[y]) })
		sorted := make([]int, len(idx))
		for i, o := range order {
			sorted[i] = idx[o]
		}
		per[m] = cut(m, sorted, size)
	}
	return interleave(per)
}

func cut(m int, idx []int, size int) []batchRef {
	var out []batchRef
	for lo := 0; lo < len(idx); lo += size {
		out = append(out, batchRef{model: m, list: idx[lo:min(lo+size, len(idx))]})
	}
	return out
}

func interleave(per [][]batchRef) []batchRef {
	var out []batchRef
	for i := 0; ; i++ {
		added := false
		for _, bs := range per {
			if i < len(bs) {
				out = append(out, bs[i])
				added = true
			}
		}
		if !added {
			return out
		}
	}
}

// expected is what a model's window must show: predictions and labeled
// predictions in the window, and the matrix by class names (actual,
// predicted).
type expected struct {
	predictions, labeled int64
	matrix               map[[2]string]int64
}

// recount recomputes from the generator model m's watermark (the end of
// the bucket holding its latest prediction), its labeled predictions and
// its figures in each of ws at that watermark.
func (s *scenario) recount(m int, ws []windows.Window) (wm time.Time, labeled int64, out []expected) {
	events := make([]event, s.perModel)
	var latest time.Time
	for j := range events {
		events[j] = s.event(m, j)
		if events[j].at.After(latest) {
			latest = events[j].at
		}
		if events[j].labeled {
			labeled++
		}
	}
	wm = windows.Watermark(latest, bucket)
	out = make([]expected, len(ws))
	for i := range out {
		out[i].matrix = map[[2]string]int64{}
	}
	for _, e := range events {
		b := windows.BucketStart(e.at, bucket)
		for i, win := range ws {
			from, to := win.Bounds(wm)
			if b.Before(from) || !b.Before(to) {
				continue
			}
			out[i].predictions++
			if e.labeled {
				out[i].labeled++
				out[i].matrix[[2]string{s.classes[e.actual], s.classes[e.predicted]}]++
			}
		}
	}
	return wm, labeled, out
}
