package storetest

import (
	"fmt"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// classesOf are the registered classes of the suite's two models.
func classesOf(model string) []string {
	if model == ticketModel {
		return []string{"billing", "access", "outage"}
	}
	return []string{"legit", "fraud"}
}

// event is one line of a random history: a prediction or a label.
type event struct {
	pred  *store.Prediction
	label *store.Label
}

// randomPrediction draws a prediction made within span after start, in
// whole seconds, with scores half of the time.
func randomPrediction(rng *rand.Rand, model, id string, start time.Time, span time.Duration) store.Prediction {
	classes := classesOf(model)
	segments := [...]string{"", "web", "app"}
	when := start.Add(time.Duration(rng.Int64N(int64(span/time.Second))) * time.Second)
	p := pred(model, id, when, classes[rng.IntN(len(classes))], segments[rng.IntN(len(segments))])
	if rng.IntN(2) == 0 {
		p.Scores = map[string]float64{}
		for _, c := range classes {
			p.Scores[c] = float64(rng.IntN(101)) / 100
		}
	}
	return p
}

// randomLabel draws a label version dated within span after start, in whole
// minutes so that equal times (ties between classes) occur.
func randomLabel(rng *rand.Rand, model, id string, start time.Time, span time.Duration) store.Label {
	classes := classesOf(model)
	when := start.Add(time.Duration(rng.Int64N(int64(span/time.Minute))) * time.Minute)
	return lab(model, id, classes[rng.IntN(len(classes))], when)
}

// randomHistory draws predictions (no conflicting repeats) and label
// versions (corrections, ties, repeats, labels whose prediction never
// comes) for both models. Its final state does not depend on delivery
// order.
func randomHistory(rng *rand.Rand) []event {
	var out []event
	for _, model := range []string{fraudModel, ticketModel} {
		for i := range 40 {
			id := fmt.Sprintf("p%03d", i)
			p := randomPrediction(rng, model, id, base(), 2*time.Hour)
			out = append(out, event{pred: &p})
			versions := rng.IntN(4)
			if rng.IntN(5) == 0 {
				versions = 0
			}
			for range versions {
				l := randomLabel(rng, model, id, base(), 6*time.Hour)
				out = append(out, event{label: &l})
				if rng.IntN(10) == 0 { // a tie: same at, another class
					tie := l
					classes := classesOf(model)
					tie.Actual = classes[(slices.Index(classes, l.Actual)+1)%len(classes)]
					out = append(out, event{label: &tie})
				}
			}
		}
		for i := range 5 {
			l := randomLabel(rng, model, fmt.Sprintf("orphan%d", i), base(), 6*time.Hour)
			out = append(out, event{label: &l})
		}
	}
	for _, e := range slices.Clone(out) {
		if rng.IntN(4) == 0 {
			out = append(out, e)
		}
	}
	return out
}

// batches shuffles events and cuts them into batches of one kind, of random
// sizes up to 20.
func batches(rng *rand.Rand, events []event) [][]event {
	order := slices.Clone(events)
	rng.Shuffle(len(order), func(i, j int) { order[i], order[j] = order[j], order[i] })
	var out [][]event
	for len(order) > 0 {
		size := 1 + rng.IntN(20)
		n := 1
		for n < len(order) && n < size && (order[n].pred != nil) == (order[0].pred != nil) {
			n++
		}
		out = append(out, order[:n])
		order = order[n:]
	}
	return out
}

// deliver sends one batch and adds its Changes to sum.
func deliver(t *testing.T, s store.Store, batch []event, now time.Time, sum tally) {
	t.Helper()
	var ch store.Changes
	if batch[0].pred != nil {
		var ps []store.Prediction
		for _, e := range batch {
			ps = append(ps, *e.pred)
		}
		ch = ingestPredictions(t, s, now, ps...).Changes
	} else {
		var ls []store.Label
		for _, e := range batch {
			ls = append(ls, *e.label)
		}
		ch = ingestLabels(t, s, now, ls...).Changes
	}
	cells, preds := changeMaps(t, ch)
	for k, n := range cells {
		sum.cells[k] += n
	}
	for k, n := range preds {
		sum.pred[k] += n
	}
}

// asOfTimes are the as-of points the random tests check.
func asOfTimes() []time.Time {
	return []time.Time{at(30 * time.Minute), at(time.Hour), at(2 * time.Hour), at(3 * time.Hour), at(5 * time.Hour), farFuture()}
}

// compareWithReference checks every read of s against ref.
func compareWithReference(t *testing.T, s store.Store, ref *reference) {
	t.Helper()
	web := "web"
	for _, model := range []string{fraudModel, ticketModel} {
		q := all(model)
		wantRefCounts(t, model+" Counts", counts(t, s, q), ref.counts(q, nil))
		wantRefCounts(t, model+" CountsAsOf far future equals Counts", countsAsOf(t, s, q, farFuture()), counts(t, s, q))
		for _, T := range asOfTimes() {
			wantRefCounts(t, model+" CountsAsOf "+T.Format(time.RFC3339), countsAsOf(t, s, q, T), ref.counts(q, &T))
		}
		q.Segment = &web
		wantRefCounts(t, model+" Counts of segment web", counts(t, s, q), ref.counts(q, nil))
		T := at(3 * time.Hour)
		wantRefCounts(t, model+" CountsAsOf 3h of segment web", countsAsOf(t, s, q, T), ref.counts(q, &T))
		preds, labeled, latest := ref.totals(model)
		wantTotals(t, s, model, preds, labeled, latest)
	}
	wantVerifyClean(t, s)
}

// testOrderIndependence delivers one random history in several random
// orders and batchings, once of them twice over, and checks that every
// delivery ends in the reference's figures, and that the Changes returned
// along the way add up to them.
func testOrderIndependence(t *testing.T, newStore func(t *testing.T) store.Store) {
	for _, seed := range []uint64{1, 2} {
		t.Run(fmt.Sprintf("seed%d", seed), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, 0x636c617373))
			history := randomHistory(rng)
			ref := newReference()
			for _, e := range history {
				if e.pred != nil {
					ref.predictions([]store.Prediction{*e.pred})
				} else {
					ref.labels([]store.Label{*e.label}, at(7*time.Hour))
				}
			}
			for delivery := range 3 {
				s := newStore(t)
				for _, m := range []string{fraudModel, ticketModel} {
					ensure(t, s, m, classesOf(m)...)
				}
				sum := tally{cells: map[changeCell]int64{}, pred: map[changePred]int64{}}
				now := at(7 * time.Hour)
				rounds := 1
				if delivery == 2 {
					rounds = 2 // the whole history delivered twice
				}
				for range rounds {
					for _, b := range batches(rng, history) {
						now = now.Add(time.Second)
						deliver(t, s, b, now, sum)
					}
				}
				compareWithReference(t, s, ref)
				compareSum(t, sum, ref.tally())
				if t.Failed() {
					t.Fatalf("delivery %d of seed %d differs", delivery, seed)
				}
			}
		})
	}
}

// compareSum checks that the Changes returned by every call add up to the
// reference's counts over all time.
func compareSum(t *testing.T, sum, want tally) {
	t.Helper()
	var c store.Changes
	for k, n := range sum.cells {
		if n != 0 {
			c.Cells = append(c.Cells, store.CellDelta{Model: k.model, Bucket: time.UnixMicro(k.bucket), Actual: k.actual, Predicted: k.predicted, N: n})
		}
	}
	for k, n := range sum.pred {
		if n != 0 {
			c.Predicted = append(c.Predicted, store.PredictedDelta{Model: k.model, Bucket: time.UnixMicro(k.bucket), Predicted: k.predicted, N: n})
		}
	}
	compareChanges(t, c, want)
}

// testReferenceHistory runs random sequences of every write (conflicting
// and defaulted-time repeats, label versions, early labels, label timeouts,
// early-label expiry) and checks each call's outcomes, counts and Changes
// against the reference, then every read.
func testReferenceHistory(t *testing.T, newStore func(t *testing.T) store.Store) {
	for _, seed := range []uint64{11, 12, 13} {
		t.Run(fmt.Sprintf("seed%d", seed), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, 0x776174636880))
			s := newStore(t)
			ctx := t.Context()
			models := []string{fraudModel, ticketModel}
			for _, m := range models {
				ensure(t, s, m, classesOf(m)...)
			}
			ref := newReference()
			now := at(3 * time.Hour)
			for step := range 80 {
				now = now.Add(time.Duration(rng.IntN(600)) * time.Second)
				model := models[rng.IntN(len(models))]
				id := func() string { return fmt.Sprintf("h%02d", rng.IntN(30)) }
				before := ref.tally()
				var got store.Changes
				switch op := rng.IntN(10); {
				case op < 4:
					var batch []store.Prediction
					for range 1 + rng.IntN(8) {
						p := randomPrediction(rng, model, id(), now.Add(-3*time.Hour), 3*time.Hour)
						if old, ok := ref.preds[refKey{model, p.ID}]; ok {
							switch rng.IntN(4) {
							case 0, 1: // an exact repeat
								p = old.p
							case 2: // a retry without "at"
								p = old.p
								p.At, p.AtDefaulted, p.Bucket = now, true, now.Truncate(bucketWidth)
							}
						}
						batch = append(batch, p)
					}
					res := ingestPredictions(t, s, now, batch...)
					wantPredictionOutcomes(t, res.Outcomes, ref.predictions(batch)...)
					got = res.Changes
				case op < 8:
					var batch []store.Label
					for range 1 + rng.IntN(8) {
						l := randomLabel(rng, model, id(), now.Add(-3*time.Hour), 3*time.Hour)
						if rp, ok := ref.preds[refKey{model, l.ID}]; ok && len(rp.versions) > 0 && rng.IntN(5) == 0 {
							v := rp.versions[rng.IntN(len(rp.versions))]
							l.Actual, l.At = v.actual, v.at // a repeat of a known version
						}
						batch = append(batch, l)
					}
					res := ingestLabels(t, s, now, batch...)
					wantLabelOutcomes(t, res.Outcomes, ref.labels(batch, now)...)
					got = res.Changes
				case op < 9:
					timeout := time.Duration(1+rng.IntN(2)) * time.Hour
					label := classesOf(model)[0]
					n, ch, err := s.ApplyLabelTimeout(ctx, model, label, timeout, now)
					if err != nil {
						t.Fatalf("step %d: ApplyLabelTimeout: %v", step, err)
					}
					if want := ref.applyTimeout(model, label, timeout, now); n != want {
						t.Errorf("step %d: ApplyLabelTimeout = %d, want %d", step, n, want)
					}
					got = ch
				default:
					n, err := s.ExpireEarlyLabels(ctx, model, 30*time.Minute, now)
					if err != nil {
						t.Fatalf("step %d: ExpireEarlyLabels: %v", step, err)
					}
					if want := ref.expire(model, 30*time.Minute, now); n != want {
						t.Errorf("step %d: ExpireEarlyLabels = %d, want %d", step, n, want)
					}
				}
				compareChanges(t, got, ref.tally().diff(before))
				if t.Failed() {
					t.Fatalf("step %d of seed %d differs from the reference", step, seed)
				}
			}
			compareWithReference(t, s, ref)
		})
	}
}

// testConcurrentIngest has several writers ingest disjoint predictions and
// labels (labels sometimes first) while a reader reads, then checks the
// result against the reference.
func testConcurrentIngest(t *testing.T, s store.Store) {
	for _, m := range []string{fraudModel, ticketModel} {
		ensure(t, s, m, classesOf(m)...)
	}
	ref := newReference()
	plans := concurrentPlans(ref)
	var wg sync.WaitGroup
	done := make(chan struct{})
	for w, plan := range plans {
		wg.Go(func() { runIngestPlan(t, s, w, plan) })
	}
	var reader sync.WaitGroup
	reader.Go(func() {
		for {
			select {
			case <-done:
				return
			default:
			}
			if _, err := s.Counts(t.Context(), all(fraudModel)); err != nil {
				t.Errorf("Counts during ingest: %v", err)
				return
			}
		}
	})
	wg.Wait()
	close(done)
	reader.Wait()
	for _, model := range []string{fraudModel, ticketModel} {
		q := all(model)
		wantRefCounts(t, model+" Counts", counts(t, s, q), ref.counts(q, nil))
		preds, labeled, latest := ref.totals(model)
		wantTotals(t, s, model, preds, labeled, latest)
	}
	wantVerifyClean(t, s)
}

// ingestPlan is one writer's batches of testConcurrentIngest, a round
// each.
type ingestPlan struct {
	preds  [][]store.Prediction
	labels [][]store.Label
}

// concurrentPlans draws four writers' ten rounds of ten predictions and
// their labels (a third of them labeled twice), every writer into the same
// few buckets, and records them in ref.
func concurrentPlans(ref *reference) []ingestPlan {
	const workers, rounds, perBatch = 4, 10, 10
	rng := rand.New(rand.NewPCG(7, 7))
	plans := make([]ingestPlan, workers)
	for w := range plans {
		model := []string{fraudModel, ticketModel}[w%2]
		for r := range rounds {
			var ps []store.Prediction
			var ls []store.Label
			for i := range perBatch {
				id := fmt.Sprintf("w%d-%02d-%02d", w, r, i)
				// Every worker writes into the same few buckets.
				ps = append(ps, randomPrediction(rng, model, id, base(), 15*time.Minute))
				ls = append(ls, randomLabel(rng, model, id, base(), time.Hour))
				if i%3 == 0 {
					ls = append(ls, randomLabel(rng, model, id, base(), time.Hour))
				}
			}
			plans[w].preds = append(plans[w].preds, ps)
			plans[w].labels = append(plans[w].labels, ls)
			ref.predictions(ps)
			ref.labels(ls, at(2*time.Hour))
		}
	}
	return plans
}

// runIngestPlan ingests writer w's rounds, the labels before the
// predictions in every other round.
func runIngestPlan(t *testing.T, s store.Store, w int, plan ingestPlan) {
	ctx := t.Context()
	for r := range plan.preds {
		labelsFirst := (w+r)%2 == 1
		if labelsFirst {
			if _, err := s.IngestLabels(ctx, plan.labels[r], at(2*time.Hour)); err != nil {
				t.Errorf("worker %d: IngestLabels: %v", w, err)
				return
			}
		}
		if _, err := s.IngestPredictions(ctx, plan.preds[r], at(2*time.Hour)); err != nil {
			t.Errorf("worker %d: IngestPredictions: %v", w, err)
			return
		}
		if !labelsFirst {
			if _, err := s.IngestLabels(ctx, plan.labels[r], at(2*time.Hour)); err != nil {
				t.Errorf("worker %d: IngestLabels: %v", w, err)
				return
			}
		}
	}
}

// testConcurrentJoin races, for each id, a prediction, its label and a
// repeat of the prediction, each in its own one-line call. Whatever the
// interleaving, every prediction is stored once and joined to its label
// once: a label that finds no prediction must still be found by the
// prediction that commits next.
func testConcurrentJoin(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, classesOf(fraudModel)...)
	const n = 60
	ctx := t.Context()
	now := at(time.Hour)
	id := func(i int) string { return fmt.Sprintf("race%02d", i) }
	p := func(i int) store.Prediction {
		return pred(fraudModel, id(i), at(time.Duration(i)*time.Second), "fraud", "")
	}
	l := func(i int) store.Label { return lab(fraudModel, id(i), "legit", now) }

	var mu sync.Mutex
	stored, joined := 0, 0
	sendPredictions := func() {
		for i := range n {
			res, err := s.IngestPredictions(ctx, []store.Prediction{p(i)}, now)
			if err != nil {
				t.Errorf("IngestPredictions(%s): %v", id(i), err)
				return
			}
			mu.Lock()
			if res.Outcomes[0] == store.PredictionStored {
				stored++
			}
			mu.Unlock()
		}
	}
	sendLabels := func() {
		for i := range n {
			res, err := s.IngestLabels(ctx, []store.Label{l(i)}, now)
			if err != nil {
				t.Errorf("IngestLabels(%s): %v", id(i), err)
				return
			}
			switch res.Outcomes[0] {
			case store.LabelMatched:
				mu.Lock()
				joined++
				mu.Unlock()
			case store.LabelEarly:
			default:
				t.Errorf("label of %s: outcome %v, want matched or early", id(i), res.Outcomes[0])
			}
		}
	}
	var wg sync.WaitGroup
	wg.Go(sendPredictions)
	wg.Go(sendLabels)
	wg.Go(sendPredictions) // every prediction twice: one must be the duplicate
	wg.Wait()

	if stored != n {
		t.Errorf("%d predictions stored, want %d", stored, n)
	}
	ref := newReference()
	for i := range n {
		ref.predictions([]store.Prediction{p(i)})
		ref.labels([]store.Label{l(i)}, now)
	}
	wantRefCounts(t, "Counts", counts(t, s, all(fraudModel)), ref.counts(all(fraudModel), nil))
	wantTotals(t, s, fraudModel, n, n, at((n-1)*time.Second))
	wantVerifyClean(t, s)
	t.Logf("%d of %d labels found their prediction; the others waited and joined on its arrival", joined, n)
}
