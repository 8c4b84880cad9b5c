package pgstore

import (
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// TestLoadHarness measures ingest throughput against the test server. It
// runs only with CLASSWATCH_LOADTEST=1, and takes minutes:
//
//	CLASSWATCH_LOADTEST=1 CLASSWATCH_TEST_DATABASE_URL=postgres://... \
//	    go test -run TestLoadHarness -v -timeout 30m ./windows/store/pgstore/
//
// CLASSWATCH_LOADTEST_N lists the sizes (default "1000000,5000000") and
// CLASSWATCH_LOADTEST_SPAN the stretch of prediction times (default 72h,
// whatever N: a larger N is then also a higher rate, and so a larger set of
// recent predictions that labels reach into). For each size N, in a fresh
// schema, it reports rows per second of
//
//	(a) raw COPY of N predictions into a bare table with the same columns
//	    (no key, no index), in transactions of loadBatch rows: the cost of
//	    writing the data once. It runs batch for batch in step with (b),
//	    and again with (c), so that each ratio compares runs made under the
//	    same load on the machine;
//	(b) IngestPredictions of the same N predictions in batches of loadBatch;
//	(c) IngestLabels of one label per prediction, in batches of loadBatch,
//	    in the order labels of a live system arrive: by prediction time plus
//	    a random delay (exponential, mean 2h);
//
// and the ratios b/a and c/a, c per million labels (to show whether the join
// slows as the tables grow), and the Go heap after N unlabeled predictions
// (the store keeps nothing per waiting prediction in memory). Figures are
// printed, not asserted: speed depends on the machine.
func TestLoadHarness(t *testing.T) {
	if os.Getenv("CLASSWATCH_LOADTEST") != "1" {
		t.Skip("set CLASSWATCH_LOADTEST=1 to run the load harness")
	}
	sizes := []int{1_000_000, 5_000_000}
	if v := os.Getenv("CLASSWATCH_LOADTEST_N"); v != "" {
		sizes = nil
		for _, f := range strings.Split(v, ",") {
			n, err := strconv.Atoi(strings.TrimSpace(f))
			if err != nil || n <= 0 {
				t.Fatalf("CLASSWATCH_LOADTEST_N: bad size %q", f)
			}
			sizes = append(sizes, n)
		}
	}
	span := 72 * time.Hour
	if v := os.Getenv("CLASSWATCH_LOADTEST_SPAN"); v != "" {
		var err error
		if span, err = time.ParseDuration(v); err != nil || span <= 0 {
			t.Fatalf("CLASSWATCH_LOADTEST_SPAN: bad duration %q", v)
		}
	}
	for _, n := range sizes {
		t.Run(fmt.Sprintf("N=%d", n), func(t *testing.T) { runLoad(t, n, span) })
	}
}

// loadBatch is the batch size of every phase.
const loadBatch = 5000

// meanLabelDelay is the mean of the exponential delay between a
// prediction's time and its label's arrival.
const meanLabelDelay = 2 * time.Hour

// loadData generates the harness's predictions and labels from their index:
// a fictional bank's card-fraud screen, three days of traffic.
type loadData struct {
	n     int
	start time.Time
	span  time.Duration
}

func (d loadData) prediction(i int) store.Prediction {
	at := d.start.Add(time.Duration(int64(d.span) / int64(d.n) * int64(i))).Truncate(time.Microsecond)
	rng := rand.New(rand.NewPCG(uint64(i), 7))
	fraud := rng.Float64()
	predicted := "legit"
	if fraud > 0.9 {
		predicted = "fraud"
	}
	return store.Prediction{
		Model: "card-fraud", ID: fmt.Sprintf("txn-%09d", i), At: at, Bucket: at.Truncate(5 * time.Minute),
		Predicted: predicted, Segment: [...]string{"web", "app", "store"}[i%3],
		Scores: map[string]float64{"fraud": math.Round(fraud*1000) / 1000, "legit": math.Round((1-fraud)*1000) / 1000},
	}
}

func (d loadData) label(i int) store.Label {
	p := d.prediction(i)
	rng := rand.New(rand.NewPCG(uint64(i), 11))
	actual := p.Predicted
	if rng.IntN(10) == 0 {
		actual = map[string]string{"legit": "fraud", "fraud": "legit"}[actual]
	}
	delay := time.Duration(rng.ExpFloat64() * float64(meanLabelDelay))
	return store.Label{Model: p.Model, ID: p.ID, Actual: actual, At: p.At.Add(delay).Truncate(time.Microsecond)}
}

func runLoad(t *testing.T, n int, span time.Duration) {
	ctx := context.Background()
	url := pgtest.URL(t)
	s, err := Open(ctx, url, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Migrate(ctx); err != nil {
		t.Fatal(err)
	}
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	d := loadData{n: n, start: time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC), span: span}
	t.Logf("%d predictions over %v (%.0f per hour), labels %v late on average", n, span, float64(n)/span.Hours(), meanLabelDelay)
	var settings []string
	for _, name := range []string{"server_version", "shared_buffers", "synchronous_commit", "fsync", "full_page_writes", "max_wal_size"} {
		var v string
		if err := s.pool.QueryRow(ctx, "SELECT current_setting($1)", name).Scan(&v); err != nil {
			t.Fatal(err)
		}
		settings = append(settings, name+"="+v)
	}
	t.Logf("server: %s; GOMAXPROCS=%d", strings.Join(settings, " "), runtime.GOMAXPROCS(0))

	// (a) is measured in step with (b) and with (c), batch for batch, so
	// that each ratio compares runs under the same load on the machine.
	for _, table := range []string{"bare_predictions", "bare_predictions_2"} {
		if _, err := s.pool.Exec(ctx, `CREATE TABLE `+table+` (
    model_id integer, id text, at timestamptz, bucket timestamptz, segment text, predicted text, scores jsonb)`); err != nil {
			t.Fatal(err)
		}
	}
	rawRows := make([][]any, 0, loadBatch)
	rawCopy := func(table string, lo int) time.Duration {
		rawRows = rawRows[:0]
		for i := lo; i < min(lo+loadBatch, n); i++ {
			p := d.prediction(i)
			scores, err := json.Marshal(p.Scores)
			if err != nil {
				t.Fatal(err)
			}
			rawRows = append(rawRows, []any{int32(1), p.ID, p.At, p.Bucket, p.Segment, p.Predicted, scores})
		}
		start := time.Now()
		if _, err := s.pool.CopyFrom(ctx, pgx.Identifier{table},
			[]string{"model_id", "id", "at", "bucket", "segment", "predicted", "scores"}, pgx.CopyFromRows(rawRows)); err != nil {
			t.Fatal(err)
		}
		return time.Since(start)
	}

	// (b) prediction ingest through the store.
	heapBefore := heapInUse()
	var raw, ingest time.Duration
	var rawBatches, ingestBatches []time.Duration
	batch := make([]store.Prediction, 0, loadBatch)
	for lo := 0; lo < n; lo += loadBatch {
		took := rawCopy("bare_predictions", lo)
		raw += took
		rawBatches = append(rawBatches, took)
		batch = batch[:0]
		for i := lo; i < min(lo+loadBatch, n); i++ {
			batch = append(batch, d.prediction(i))
		}
		start := time.Now()
		res, err := s.IngestPredictions(ctx, batch, d.start)
		if err != nil {
			t.Fatal(err)
		}
		ingest += time.Since(start)
		ingestBatches = append(ingestBatches, time.Since(start))
		if res.Outcomes[0] != store.PredictionStored {
			t.Fatalf("batch at %d: outcome %d", lo, res.Outcomes[0])
		}
	}
	batch = nil
	heapAfter := heapInUse()
	rawRate, predRate := float64(n)/raw.Seconds(), float64(n)/ingest.Seconds()
	t.Logf("(a) raw COPY:          %9.0f rows/s (%v)", rawRate, raw.Round(time.Millisecond))
	t.Logf("(b) prediction ingest: %9.0f rows/s (%v); b/a = %.0f%%", predRate, ingest.Round(time.Millisecond), 100*predRate/rawRate)
	t.Logf("    median batch: a %v, b %v; b/a = %.0f%%", median(rawBatches), median(ingestBatches),
		100*float64(median(rawBatches))/float64(median(ingestBatches)))
	t.Logf("Go heap in use after GC: %.1f MiB before ingest, %.1f MiB after %d unlabeled predictions",
		float64(heapBefore)/(1<<20), float64(heapAfter)/(1<<20), n)

	// (c) label join, labels in arrival order.
	order := make([]int, n)
	arrival := make([]int64, n)
	for i := range order {
		order[i] = i
		arrival[i] = d.label(i).At.UnixMicro()
	}
	slices.SortFunc(order, func(x, y int) int { return cmp.Compare(arrival[x], arrival[y]) })
	arrival = nil
	var raw2, join, segment time.Duration
	var rawBatches2, joinBatches []time.Duration
	var perMillion []string
	labels := make([]store.Label, 0, loadBatch)
	for lo := 0; lo < n; lo += loadBatch {
		took := rawCopy("bare_predictions_2", lo)
		raw2 += took
		rawBatches2 = append(rawBatches2, took)
		labels = labels[:0]
		for _, i := range order[lo:min(lo+loadBatch, n)] {
			labels = append(labels, d.label(i))
		}
		start := time.Now()
		res, err := s.IngestLabels(ctx, labels, d.start)
		if err != nil {
			t.Fatal(err)
		}
		took = time.Since(start)
		join += took
		segment += took
		joinBatches = append(joinBatches, took)
		if res.Outcomes[0] != store.LabelMatched {
			t.Fatalf("label batch at %d: outcome %v", lo, res.Outcomes[0])
		}
		if done := lo + len(labels); done%1_000_000 == 0 || done == n {
			perMillion = append(perMillion, fmt.Sprintf("%.0f", float64((done-1)%1_000_000+1)/segment.Seconds()))
			segment = 0
		}
	}
	rawRate2, joinRate := float64(n)/raw2.Seconds(), float64(n)/join.Seconds()
	t.Logf("(a) raw COPY:          %9.0f rows/s (%v), in step with (c)", rawRate2, raw2.Round(time.Millisecond))
	t.Logf("(c) label join:        %9.0f rows/s (%v); c/a = %.0f%%", joinRate, join.Round(time.Millisecond), 100*joinRate/rawRate2)
	t.Logf("    median batch: a %v, c %v; c/a = %.0f%%", median(rawBatches2), median(joinBatches),
		100*float64(median(rawBatches2))/float64(median(joinBatches)))
	t.Logf("label join per million labels (rows/s): %s", strings.Join(perMillion, ", "))

	var sizes string
	if err := s.pool.QueryRow(ctx, `SELECT string_agg(format('%s=%s', r, pg_size_pretty(
    CASE WHEN c.relkind = 'p' THEN (SELECT sum(pg_total_relation_size(i.inhrelid)) FROM pg_inherits i WHERE i.inhparent = c.oid)::bigint
         ELSE pg_total_relation_size(c.oid) END)), ' ' ORDER BY r)
FROM unnest(array['bare_predictions','predictions','prediction_scores','label_versions','cells']) AS r
JOIN pg_class c ON c.oid = to_regclass(r)`).Scan(&sizes); err != nil {
		t.Fatal(err)
	}
	t.Logf("table sizes (with indexes): %s", sizes)
}

// median returns the median of ds; the harness reports it beside the
// totals because it ignores the batches slowed by other work on the machine.
func median(ds []time.Duration) time.Duration {
	s := slices.Clone(ds)
	slices.Sort(s)
	return s[len(s)/2].Round(10 * time.Microsecond)
}

// heapInUse returns the Go heap in use after a collection.
func heapInUse() uint64 {
	runtime.GC()
	var m runtime.MemStats
	runtime.ReadMemStats(&m)
	return m.HeapInuse
}
