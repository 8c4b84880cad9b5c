package pgstore

import (
	"cmp"
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// TestLoadHarness measures ingest throughput and batch latency against the
// test server. It runs only with CLASSWATCH_LOADTEST=1, and takes minutes:
//
//	CLASSWATCH_LOADTEST=1 CLASSWATCH_TEST_DATABASE_URL=postgres://... \
//	    go test -run TestLoadHarness -v -timeout 60m ./windows/store/pgstore/
//
// Settings (environment):
//
//	CLASSWATCH_LOADTEST_N        sizes, comma-separated (default 1000000)
//	CLASSWATCH_LOADTEST_RUNS     scenarios as models x clients per model,
//	                             comma-separated (default "1x4,1x1,4x4")
//	CLASSWATCH_LOADTEST_CLASSES  classes per model (default 12)
//	CLASSWATCH_LOADTEST_SCORES   1: every prediction carries a score per
//	                             class (default), 0: none, both: run each
//	                             scenario twice, without and with scores
//	CLASSWATCH_LOADTEST_SPAN     stretch of prediction times (default 72h)
//
// For each size N and scenario, in a fresh schema, it stores N predictions
// and then one label for 90% of them (in the order labels of a live system
// arrive: by prediction time plus an exponential delay of mean 2h), in
// batches of loadBatch lines, each batch of one model, spread over the
// scenario's concurrent clients. The baseline is a raw COPY of the same
// prediction rows into a bare table keyed like predictions (primary key
// (model_id, id), no other index), by the same number of clients. Baseline
// and store phases alternate in chunks of loadChunk batches, so each ratio
// compares runs made under the same load on the machine. It reports rows
// per second of each phase and their ratio, label rate per million labels
// (to show whether the join slows as the tables grow), batch latency
// percentiles, and the Go heap after the unlabeled predictions. When the
// server has pg_stat_statements loaded, it prints the statements that took
// most server time in each phase. Figures are printed, not asserted:
// speed depends on the machine. The run then checks the totals (every
// label counted once) and Verify.
func TestLoadHarness(t *testing.T) {
	if os.Getenv("CLASSWATCH_LOADTEST") != "1" {
		t.Skip("set CLASSWATCH_LOADTEST=1 to run the load harness")
	}
	sizes := envInts(t, "CLASSWATCH_LOADTEST_N", "1000000")
	classes := envInts(t, "CLASSWATCH_LOADTEST_CLASSES", "12")[0]
	span := 72 * time.Hour
	if v := os.Getenv("CLASSWATCH_LOADTEST_SPAN"); v != "" {
		var err error
		if span, err = time.ParseDuration(v); err != nil || span <= 0 {
			t.Fatalf("CLASSWATCH_LOADTEST_SPAN: bad duration %q", v)
		}
	}
	scores := []bool{true}
	switch os.Getenv("CLASSWATCH_LOADTEST_SCORES") {
	case "0":
		scores = []bool{false}
	case "both":
		scores = []bool{false, true}
	}
	runs := os.Getenv("CLASSWATCH_LOADTEST_RUNS")
	if runs == "" {
		runs = "1x4,1x1,4x4"
	}
	for _, n := range sizes {
		for _, run := range strings.Split(runs, ",") {
			var models, clients int
			if _, err := fmt.Sscanf(strings.TrimSpace(run), "%dx%d", &models, &clients); err != nil || models <= 0 || clients <= 0 {
				t.Fatalf("CLASSWATCH_LOADTEST_RUNS: bad scenario %q", run)
			}
			for _, sc := range scores {
				d := loadData{n: n, models: models, classes: classes, scores: sc,
					start: time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC), span: span}
				name := fmt.Sprintf("N=%d/models=%d/clients=%d/scores=%v", n, models, models*clients, sc)
				t.Run(name, func(t *testing.T) { runLoad(t, d, models*clients) })
			}
		}
	}
}

// envInts reads a comma-separated list of positive integers.
func envInts(t *testing.T, name, def string) []int {
	v := os.Getenv(name)
	if v == "" {
		v = def
	}
	var out []int
	for _, f := range strings.Split(v, ",") {
		n, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || n <= 0 {
			t.Fatalf("%s: bad value %q", name, f)
		}
		out = append(out, n)
	}
	return out
}

// loadBatch is the batch size of every phase; loadChunk is how many batches
// a phase runs before the other phase takes its turn.
const (
	loadBatch = 5000
	loadChunk = 16
)

// meanLabelDelay is the mean of the exponential delay between a
// prediction's time and its label's arrival.
const meanLabelDelay = 2 * time.Hour

// loadData generates the harness's predictions and labels from their index:
// a fictional warehouse's parcel classifiers, three days of traffic.
// Prediction i belongs to model i mod models; prediction i is labeled
// unless i mod 10 is 9.
type loadData struct {
	n, models, classes int
	scores             bool
	start              time.Time
	span               time.Duration
}

func (d loadData) model(m int) string { return fmt.Sprintf("parcel-%d", m) }

func (d loadData) class(c int) string { return fmt.Sprintf("bin-%02d", c) }

func (d loadData) prediction(i int) store.Prediction {
	at := d.start.Add(time.Duration(int64(d.span) / int64(d.n) * int64(i))).Truncate(time.Microsecond)
	rng := rand.New(rand.NewPCG(uint64(i), 7))
	// A skewed class mix: class c with weight 1/(c+1).
	c := int(float64(d.classes) * rng.Float64() * rng.Float64())
	p := store.Prediction{
		Model: d.model(i % d.models), ID: fmt.Sprintf("pcl-%09d", i), At: at, Bucket: at.Truncate(5 * time.Minute),
		Predicted: d.class(c), Segment: [...]string{"north", "south", "east"}[i%3],
	}
	if d.scores {
		p.Scores = make(map[string]float64, d.classes)
		rest := 1.0
		top := float64(int(500+rng.IntN(500))) / 1000
		p.Scores[p.Predicted], rest = top, 1-top
		for k := range d.classes {
			if k != c {
				s := float64(int(rest*1000/float64(d.classes))) / 1000
				p.Scores[d.class(k)] = s
			}
		}
	}
	return p
}

func (d loadData) labeled(i int) bool { return i%10 != 9 }

func (d loadData) label(i int) store.Label {
	p := d.prediction(i)
	rng := rand.New(rand.NewPCG(uint64(i), 11))
	actual := p.Predicted
	if rng.IntN(5) == 0 {
		actual = d.class(rng.IntN(d.classes))
	}
	delay := time.Duration(rng.ExpFloat64() * float64(meanLabelDelay))
	return store.Label{Model: p.Model, ID: p.ID, Actual: actual, At: p.At.Add(delay).Truncate(time.Microsecond)}
}

// loadRun is one scenario's store, baseline tables and figures.
type loadRun struct {
	t       *testing.T
	s       *Store
	d       loadData
	clients int
}

func runLoad(t *testing.T, d loadData, clients int) {
	ctx := context.Background()
	s, err := Open(ctx, pgtest.URL(t), Options{MaxConns: int32(clients) + 1})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Migrate(ctx); err != nil {
		t.Fatal(err)
	}
	var classes []string
	for c := range d.classes {
		classes = append(classes, d.class(c))
	}
	for m := range d.models {
		if _, err := s.EnsureModel(ctx, d.model(m), classes, 0); err != nil {
			t.Fatal(err)
		}
	}
	r := &loadRun{t: t, s: s, d: d, clients: clients}
	r.logSettings(ctx)
	for _, table := range []string{"bare_predictions", "bare_predictions_2"} {
		if _, err := s.pool.Exec(ctx, `CREATE TABLE `+table+` (model_id integer, id text COLLATE "C", at timestamptz,
    bucket timestamptz, segment text COLLATE "C", predicted text COLLATE "C", scores jsonb, PRIMARY KEY (model_id, id))`); err != nil {
			t.Fatal(err)
		}
	}
	predBatches := r.predictionBatches()
	r.resetStatements(ctx)
	heapBefore := heapInUse()
	raw, ingest := r.phases(predBatches, "bare_predictions", false, r.ingestPredictions)
	heapAfter := heapInUse()
	r.report("prediction ingest", raw, ingest, d.n)
	r.logStatements(ctx, "prediction phase")
	t.Logf("Go heap in use after GC: %.1f MiB before ingest, %.1f MiB after %d unlabeled predictions",
		float64(heapBefore)/(1<<20), float64(heapAfter)/(1<<20), d.n)

	r.resetStatements(ctx)
	labelBatches := r.labelBatches()
	nLabels := 0
	for _, b := range labelBatches {
		nLabels += len(b)
	}
	raw2, join := r.phases(labelBatches, "bare_predictions_2", true, r.ingestLabels)
	r.report("label join", raw2, join, nLabels)
	r.logPerMillion(raw2, join)
	r.logStatements(ctx, "label phase")
	r.check(ctx, nLabels)
}

// logSettings prints the server's durability settings.
func (r *loadRun) logSettings(ctx context.Context) {
	var settings []string
	for _, name := range []string{"server_version", "shared_buffers", "synchronous_commit", "fsync", "full_page_writes", "max_wal_size"} {
		var v string
		if err := r.s.pool.QueryRow(ctx, "SELECT current_setting($1)", name).Scan(&v); err != nil {
			r.t.Fatal(err)
		}
		settings = append(settings, name+"="+v)
	}
	r.t.Logf("%d predictions of %d model(s), %d classes, scores %v, over %v; labels for 90%%, %v late on average; %d clients",
		r.d.n, r.d.models, r.d.classes, r.d.scores, r.d.span, meanLabelDelay, r.clients)
	r.t.Logf("server: %s; GOMAXPROCS=%d", strings.Join(settings, " "), runtime.GOMAXPROCS(0))
}

// predictionBatches splits the predictions, per model in time order, into
// batches of one model each, interleaving the models.
func (r *loadRun) predictionBatches() [][]int {
	per := make([][]int, r.d.models)
	for i := range r.d.n {
		per[i%r.d.models] = append(per[i%r.d.models], i)
	}
	return interleave(per)
}

// labelBatches splits the labeled predictions, per model in label arrival
// order, into batches of one model each, interleaving the models.
func (r *loadRun) labelBatches() [][]int {
	per := make([][]int, r.d.models)
	arrival := make([]int64, r.d.n)
	for i := range r.d.n {
		if r.d.labeled(i) {
			per[i%r.d.models] = append(per[i%r.d.models], i)
			arrival[i] = r.d.label(i).At.UnixMicro()
		}
	}
	for _, p := range per {
		slices.SortFunc(p, func(x, y int) int { return cmp.Or(cmp.Compare(arrival[x], arrival[y]), cmp.Compare(x, y)) })
	}
	return interleave(per)
}

// interleave cuts each list into loadBatch pieces and deals them out in turn.
func interleave(per [][]int) [][]int {
	var out [][]int
	for lo := 0; ; lo += loadBatch {
		added := false
		for _, p := range per {
			if lo < len(p) {
				out = append(out, p[lo:min(lo+loadBatch, len(p))])
				added = true
			}
		}
		if !added {
			return out
		}
	}
}

// phaseStats are the wall time and per-batch latencies of one phase.
type phaseStats struct {
	wall    time.Duration
	batches []time.Duration
	// chunks are the wall times of each chunk, with the lines it held.
	chunks []chunkTime
}

type chunkTime struct {
	lines int
	wall  time.Duration
}

// work is one batch's input, generated before the timed phases: the
// baseline's raw rows and the store's lines.
type work struct {
	raw    [][]any
	preds  []store.Prediction
	labels []store.Label
}

// prepare generates the input of batch.
func (r *loadRun) prepare(batch []int, labels bool) work {
	w := work{raw: make([][]any, 0, len(batch))}
	for _, i := range batch {
		p := r.d.prediction(i)
		var scores []byte
		if p.Scores != nil {
			scores = appendScores(nil, p.Scores)
		}
		w.raw = append(w.raw, []any{int32(1 + i%r.d.models), p.ID, p.At, p.Bucket, p.Segment, p.Predicted, scores})
		if labels {
			w.labels = append(w.labels, r.d.label(i))
		} else {
			w.preds = append(w.preds, p)
		}
	}
	return w
}

// phases runs the baseline COPY of batches' predictions into table and the
// store phase run on the same batches, chunk by chunk in turn, each with
// r.clients concurrent clients. Each chunk's input is generated before
// either phase runs on it.
func (r *loadRun) phases(batches [][]int, table string, labels bool, run func(context.Context, work) error) (raw, store phaseStats) {
	for lo := 0; lo < len(batches); lo += loadChunk {
		var chunk []work
		for _, b := range batches[lo:min(lo+loadChunk, len(batches))] {
			chunk = append(chunk, r.prepare(b, labels))
		}
		r.concurrently(chunk, &raw, func(ctx context.Context, w work) error {
			_, err := r.s.pool.CopyFrom(ctx, pgx.Identifier{table},
				[]string{"model_id", "id", "at", "bucket", "segment", "predicted", "scores"}, pgx.CopyFromRows(w.raw))
			return err
		})
		r.concurrently(chunk, &store, run)
	}
	return raw, store
}

// concurrently runs fn on every batch of chunk with r.clients workers and
// adds the chunk's wall time and each batch's latency to st.
func (r *loadRun) concurrently(chunk []work, st *phaseStats, fn func(context.Context, work) error) {
	ctx := context.Background()
	next := make(chan work)
	var (
		mu    sync.Mutex
		wg    sync.WaitGroup
		errs  []error
		lines int
	)
	start := time.Now()
	for range r.clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for b := range next {
				t0 := time.Now()
				err := fn(ctx, b)
				took := time.Since(t0)
				mu.Lock()
				st.batches = append(st.batches, took)
				if err != nil {
					errs = append(errs, err)
				}
				mu.Unlock()
			}
		}()
	}
	for _, b := range chunk {
		next <- b
		lines += len(b.raw)
	}
	close(next)
	wg.Wait()
	wall := time.Since(start)
	st.wall += wall
	st.chunks = append(st.chunks, chunkTime{lines, wall})
	if len(errs) > 0 {
		r.t.Fatal(errs[0])
	}
}

func (r *loadRun) ingestPredictions(ctx context.Context, w work) error {
	res, err := r.s.IngestPredictions(ctx, w.preds, r.d.start)
	if err == nil && slices.ContainsFunc(res.Outcomes, func(o store.PredictionOutcome) bool { return o != store.PredictionStored }) {
		err = fmt.Errorf("prediction batch of %s: not every line stored", w.preds[0].ID)
	}
	return err
}

func (r *loadRun) ingestLabels(ctx context.Context, w work) error {
	res, err := r.s.IngestLabels(ctx, w.labels, r.d.start)
	if err == nil && slices.ContainsFunc(res.Outcomes, func(o store.LabelOutcome) bool { return o != store.LabelMatched }) {
		err = fmt.Errorf("label batch of %s: not every line matched", w.labels[0].ID)
	}
	return err
}

// report prints a phase's rate against its baseline and its latencies.
func (r *loadRun) report(what string, raw, st phaseStats, lines int) {
	rawRate, rate := float64(lines)/raw.wall.Seconds(), float64(lines)/st.wall.Seconds()
	r.t.Logf("baseline raw COPY:  %9.0f rows/s (%v)", rawRate, raw.wall.Round(time.Millisecond))
	r.t.Logf("%-18s  %9.0f rows/s (%v); ratio to the baseline %.2f", what+":", rate, st.wall.Round(time.Millisecond), rate/rawRate)
	r.t.Logf("    %s batch latency p50 %v, p99 %v, max %v (baseline p50 %v, p99 %v)", what,
		percentile(st.batches, 50), percentile(st.batches, 99), percentile(st.batches, 100),
		percentile(raw.batches, 50), percentile(raw.batches, 99))
}

// logPerMillion prints the label rate over each million labels, with the
// baseline's rate over the same chunks and their ratio: the baseline's
// table grows as the store's does, so a decline both share is the
// server's, not the join's.
func (r *loadRun) logPerMillion(raw, st phaseStats) {
	var (
		out           []string
		lines         int
		wall, rawWall time.Duration
	)
	for i, c := range st.chunks {
		lines += c.lines
		wall += c.wall
		rawWall += raw.chunks[i].wall
		if lines >= 1_000_000 || i == len(st.chunks)-1 {
			rate, rawRate := float64(lines)/wall.Seconds(), float64(lines)/rawWall.Seconds()
			out = append(out, fmt.Sprintf("%.0f (COPY %.0f, %.2f)", rate, rawRate, rate/rawRate))
			lines, wall, rawWall = 0, 0, 0
		}
	}
	r.t.Logf("label join per million labels, rows/s (same-run COPY, ratio): %s", strings.Join(out, ", "))
}

// resetStatements clears pg_stat_statements when the server has it.
func (r *loadRun) resetStatements(ctx context.Context) {
	_, _ = r.s.pool.Exec(ctx, `SELECT public.pg_stat_statements_reset()`)
}

// logStatements prints the statements that took most server time since
// resetStatements, when the server has pg_stat_statements.
func (r *loadRun) logStatements(ctx context.Context, phase string) {
	rows, err := r.s.pool.Query(ctx, `SELECT calls, round(total_exec_time)::bigint, round(100 * total_exec_time / sum(total_exec_time) OVER ())::int,
    shared_blks_hit + shared_blks_read, shared_blks_dirtied, left(regexp_replace(query, '\s+', ' ', 'g'), 110)
FROM public.pg_stat_statements WHERE dbid = (SELECT oid FROM pg_database WHERE datname = current_database()) ORDER BY total_exec_time DESC LIMIT 8`)
	if err != nil {
		return
	}
	var (
		calls, ms, blocks, dirtied int64
		share                      int32
		query                      string
	)
	r.t.Logf("pg_stat_statements, %s: calls, ms, share, blocks, dirtied, statement", phase)
	_, err = pgx.ForEachRow(rows, []any{&calls, &ms, &share, &blocks, &dirtied, &query}, func() error {
		r.t.Logf("  %7d %7d %3d%% %9d %7d %s", calls, ms, share, blocks, dirtied, query)
		return nil
	})
	if err != nil {
		r.t.Log(err)
	}
}

// check proves nothing was lost or counted twice: the labeled totals equal
// the labels sent, and Verify finds no difference.
func (r *loadRun) check(ctx context.Context, nLabels int) {
	ms, err := r.s.Models(ctx)
	if err != nil {
		r.t.Fatal(err)
	}
	var preds, labeled int64
	for _, m := range ms {
		preds += m.Predictions
		labeled += m.Labeled
	}
	if preds != int64(r.d.n) || labeled != int64(nLabels) {
		r.t.Errorf("totals: %d predictions, %d labeled; want %d, %d", preds, labeled, r.d.n, nLabels)
	}
	diffs, err := r.s.Verify(ctx)
	if err != nil {
		r.t.Fatal(err)
	}
	if len(diffs) > 0 {
		r.t.Errorf("Verify: %d differences, first %+v", len(diffs), diffs[0])
	}
}

// percentile returns the p-th percentile of ds (100: the maximum).
func percentile(ds []time.Duration, p int) time.Duration {
	s := slices.Clone(ds)
	slices.Sort(s)
	i := min(len(s)-1, (len(s)*p)/100)
	return s[i].Round(time.Millisecond)
}

// heapInUse returns the Go heap in use after a collection.
func heapInUse() uint64 {
	runtime.GC()
	var m runtime.MemStats
	runtime.ReadMemStats(&m)
	return m.HeapInuse
}
