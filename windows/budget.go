package windows

import (
	"fmt"
	"slices"
)

// DefaultMaxSeries is the series budget of one scrape of a tracker's
// gatherer when TrackerOptions.MaxSeries is zero. At the label lengths of
// the default caps (100 models, 50 classes, windows "1h", "1d" and
// "7d-matured") a series takes about 90 bytes of Prometheus text, so a
// full budget is about 7.3 MB (TestScrapeSizeAtDefaultCaps).
const DefaultMaxSeries = 80_000

// Tiers of a model's series, in the order a series budget keeps them: a
// budget too small for every model's series leaves out the last tiers
// first.
const (
	tierWindow    = iota // watermark, window bounds and counts, window-scope figures
	tierClass            // per-class prediction counts and figures
	tierCells            // non-zero confusion cells
	tierZeroCells        // zero confusion cells
	numTiers
)

// allocate sets each model's level (how many tiers it exports) and
// omitted (the series it leaves out) so that the tiers kept hold at most
// budget series; a negative budget keeps everything. Tiers are granted in
// order to every model while they fit; the first tier that does not fit
// for all goes to the models whose share of it is smallest (then by name)
// while it fits, and no model gets a later tier.
func allocate(models []modelFigures, budget int) {
	for i := range models {
		models[i].level, models[i].omitted = 0, 0
	}
	remaining := budget
	for tier := range numTiers {
		var due []int
		total := 0
		for i := range models {
			if models[i].level == tier {
				due = append(due, i)
				total += models[i].tiers[tier]
			}
		}
		if budget < 0 || total <= remaining {
			for _, i := range due {
				models[i].level++
			}
			remaining -= total
			continue
		}
		// models are sorted by name, so a stable sort by size keeps names
		// in order among equals.
		slices.SortStableFunc(due, func(a, b int) int { return models[a].tiers[tier] - models[b].tiers[tier] })
		for _, i := range due {
			if s := models[i].tiers[tier]; s <= remaining {
				models[i].level++
				remaining -= s
			}
		}
		break
	}
	for i := range models {
		for tier := models[i].level; tier < numTiers; tier++ {
			models[i].omitted += models[i].tiers[tier]
		}
	}
}

// tierSizes counts mf's series per tier exactly: undefined figures give
// none, and cells are split into non-zero and zero ones.
func (g *promGatherer) tierSizes(mf *modelFigures) {
	mf.tiers = [numTiers]int{}
	if !mf.watermark.IsZero() {
		mf.tiers[tierWindow]++
	}
	for i := range mf.views {
		vf := &mf.views[i]
		mf.tiers[tierWindow] += 2 // predictions and labeled
		if !vf.v.Watermark.IsZero() {
			mf.tiers[tierWindow] += 2 // start and end
		}
		for _, f := range g.perWindow {
			if _, ok := f.value(&vf.m, 0); ok {
				mf.tiers[tierWindow]++
			}
		}
		n := len(mf.class)
		mf.tiers[tierClass] += n // class predictions
		for _, f := range g.perClass {
			for k := range n {
				if _, ok := f.value(&vf.m, k); ok {
					mf.tiers[tierClass]++
				}
			}
		}
		for _, c := range vf.v.Matrix.cells {
			if c != 0 {
				mf.tiers[tierCells]++
			} else {
				mf.tiers[tierZeroCells]++
			}
		}
	}
}

// ModelShape is what bounds one model's series: its class cap and its
// number of windows.
type ModelShape struct {
	// Classes is the most classes the model can have; 0 means no cap.
	Classes int
	Windows int
}

// ScrapeSeriesBound returns the most series a full scrape of models of
// these shapes can give, every figure defined and every cell exported
// (not counting classwatch_scrape_omitted_series), and false when a model
// without a class cap leaves it unbounded.
func ScrapeSeriesBound(shapes []ModelShape) (series int, bounded bool) {
	perWindow, perClass := metricFamilies()
	for _, s := range shapes {
		if s.Classes <= 0 {
			return 0, false
		}
		n := s.Classes
		series += 1 + s.Windows*(4+len(perWindow)+n*(1+len(perClass))+n*n)
	}
	return series, true
}

// CheckScrapeBudget returns an error describing how far a full scrape of
// models of these shapes can exceed the series budget maxSeries (zero for
// DefaultMaxSeries, negative for none), or nil when it cannot. Past the
// budget a scrape leaves series out in the order the package documentation
// gives; the daemon warns with this error at start-up.
func CheckScrapeBudget(shapes []ModelShape, maxSeries int) error {
	if maxSeries < 0 {
		return nil
	}
	if maxSeries == 0 {
		maxSeries = DefaultMaxSeries
	}
	series, bounded := ScrapeSeriesBound(shapes)
	switch {
	case !bounded:
		return fmt.Errorf("a model without a class cap can exceed the /metrics budget of %d series: past it, zero confusion cells, then confusion cells, then per-class figures are left out (see classwatch_scrape_omitted_series)", maxSeries)
	case series > maxSeries:
		return fmt.Errorf("a full /metrics scrape of %d models can reach %d series, over the budget of %d: past it, zero confusion cells, then confusion cells, then per-class figures are left out (see classwatch_scrape_omitted_series)", len(shapes), series, maxSeries)
	}
	return nil
}
