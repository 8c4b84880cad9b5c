package main

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"runtime"
	"slices"
	"time"

	"github.com/classwatch/classwatch/cmd/internal/loadkit"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore"
)

// pushResults are the figures of the ingest benchmark.
type pushResults struct {
	Predictions, Labels int
	StorePredictions    phase
	HTTPPredictions     phase
	StoreLabels         phase
	HTTPLabels          phase
	// Daemon memory: RSS once ready, the largest sampled RSS while
	// pushing, RSS at the end, and the kernel's peak (VmHWM).
	RSSReady, RSSPeak, RSSEnd, RSSHWM int64
	// WindowsChecked counts the (model, window) figures compared with the
	// generator's recount; Checked reports that every comparison held.
	WindowsChecked int
	Checked        bool
}

// pushClasses is the number of classes of each model of the ingest
// benchmark.
const pushClasses = 6

// pushWindows are the windows of the ingest benchmark: the daemon's
// defaults (README.md "Configuration").
func pushWindows() []windows.Window {
	return []windows.Window{
		{Name: "1h", Length: time.Hour},
		{Name: "1d", Length: 24 * time.Hour},
		{Name: "7d-matured", Length: 168 * time.Hour, Lag: 72 * time.Hour},
	}
}

// runPush runs the ingest benchmark: for predictions, then labels, the
// store phase and right after it the HTTP phase, on two fresh databases.
func (h *harness) runPush(ctx context.Context) (_ *pushResults, err error) {
	o := h.opts
	// Prediction times end a few minutes ago, so no event lies ahead of
	// the daemon's clock whatever its limits.
	end := time.Now().Add(-5 * time.Minute)
	sc := newScenario(o.Seed, "dock", o.Models, pushClasses, o.N/o.Models, end, []zone{{share: 1, from: o.span, to: 0}}, o.LabelFraction)
	predRefs, labelRefs := sc.predictionBatches(o.Batch), sc.labelBatches(o.Batch)
	res := &pushResults{Predictions: o.N}
	for _, b := range labelRefs {
		res.Labels += len(b.list)
	}
	fmt.Fprintf(h.progress, "ingest benchmark: %d predictions and %d labels of %d models, batches of %d lines, %d clients\n",
		res.Predictions, res.Labels, o.Models, o.Batch, o.Clients)

	r := pushRun{sc: sc}
	if r.st, err = h.openPushStore(ctx, sc); err != nil {
		return res, err
	}
	defer func() { err = errors.Join(err, r.st.Close()) }()
	if r.d, err = h.startDaemon(ctx, "ingest", sc, pushWindows()); err != nil {
		return res, err
	}
	defer func() {
		if err != nil {
			err = errors.Join(err, r.d.LogTail())
		}
		err = errors.Join(err, r.d.Stop())
	}()
	r.rss = sampleRSS(r.d.PID, 250*time.Millisecond)
	defer func() { err = errors.Join(err, r.rss.close()) }()
	if res.RSSReady, _, err = memory(r.d.PID); err != nil {
		return res, err
	}
	r.cl = newClient(r.d.Base, o.Clients)
	defer r.cl.close()

	preds := lineKind[store.Prediction]{name: "predictions", path: "/v1/predictions", outcome: "stored",
		line: sc.prediction, appendLine: sc.appendPrediction,
		ingest: func(ctx context.Context, ps []store.Prediction) (int, error) {
			out, err := r.st.IngestPredictions(ctx, ps, time.Now())
			return count(out.Outcomes, store.PredictionStored), err
		}}
	if res.StorePredictions, res.HTTPPredictions, err = pushPhases(ctx, h, r, preds, predRefs); err != nil {
		return res, err
	}
	labels := lineKind[store.Label]{name: "labels", path: "/v1/labels", outcome: "matched",
		line: sc.label, appendLine: sc.appendLabel,
		ingest: func(ctx context.Context, ls []store.Label) (int, error) {
			out, err := r.st.IngestLabels(ctx, ls, time.Now())
			return count(out.Outcomes, store.LabelMatched), err
		}}
	if res.StoreLabels, res.HTTPLabels, err = pushPhases(ctx, h, r, labels, labelRefs); err != nil {
		return res, err
	}
	res.RSSPeak = max(res.HTTPPredictions.PeakRSS, res.HTTPLabels.PeakRSS)
	labeled, checked, err := h.check(ctx, r.cl, sc)
	res.WindowsChecked = checked
	if err != nil {
		return res, err
	}
	if err := checkStore(ctx, r.st, sc, labeled); err != nil {
		return res, err
	}
	res.Checked = true
	if res.RSSEnd, res.RSSHWM, err = memory(r.d.PID); err != nil {
		return res, err
	}
	return res, nil
}

// pushRun is what the ingest benchmark's phases share: the store of the
// store phases and the daemon of the HTTP phases, with its client and
// memory sampler.
type pushRun struct {
	sc  *scenario
	st  *pgstore.Store
	d   *loadkit.Daemon
	cl  *client
	rss *rssSampler
}

// openPushStore opens the store of the store phases on a fresh database,
// migrated, with the scenario's models registered.
func (h *harness) openPushStore(ctx context.Context, sc *scenario) (*pgstore.Store, error) {
	storeURL, err := h.srv.create(ctx)
	if err != nil {
		return nil, err
	}
	st, err := pgstore.Open(ctx, storeURL, pgstore.Options{})
	if err != nil {
		return nil, err
	}
	if err := st.Migrate(ctx); err != nil {
		return nil, errors.Join(fmt.Errorf("migrate store: %w", err), st.Close())
	}
	for _, m := range sc.models {
		if _, err := st.EnsureModel(ctx, m, sc.classes, 0); err != nil {
			return nil, errors.Join(fmt.Errorf("register model: %w", err), st.Close())
		}
	}
	return st, nil
}

// refLines returns the line count of batch i of refs.
func refLines(refs []batchRef) func(int) int { return func(i int) int { return len(refs[i].list) } }

// lineKind says how pushPhases makes and stores one kind of line.
type lineKind[T any] struct {
	name, path string // "predictions", "/v1/predictions"
	outcome    string // what ingest counts: "stored"
	line       func(e *event) T
	appendLine func(b []byte, e *event) []byte
	// ingest stores lines and returns how many took the expected outcome.
	ingest func(ctx context.Context, lines []T) (int, error)
}

// pushPhases runs the store phase of one kind of line, then the same
// batches over HTTP.
func pushPhases[T any](ctx context.Context, h *harness, r pushRun, k lineKind[T], refs []batchRef) (storePh, httpPh phase, err error) {
	batches := make([][]T, len(refs))
	for i, b := range refs {
		for _, j := range b.list {
			e := r.sc.event(b.model, j)
			batches[i] = append(batches[i], k.line(&e))
		}
	}
	runtime.GC()
	storePh, err = runPhase(ctx, "store "+k.name, len(refs), h.opts.Clients, refLines(refs), meter{srv: h.srv},
		func(ctx context.Context, i int) (time.Duration, int, error) {
			start := time.Now()
			n, err := k.ingest(ctx, batches[i])
			took := time.Since(start)
			if err != nil {
				return 0, 0, err
			}
			if n != len(batches[i]) {
				return 0, 0, fmt.Errorf("%d of %d %s %s", n, len(batches[i]), k.name, k.outcome)
			}
			return took, 0, nil
		}, h.progress)
	if err != nil {
		return storePh, phase{}, err
	}
	// Store batches go out of use here; the GC before each phase frees
	// them, so that neither phase pays for the other's data.
	bodies := make([][]byte, len(refs))
	for i, b := range refs {
		for _, j := range b.list {
			e := r.sc.event(b.model, j)
			bodies[i] = k.appendLine(bodies[i], &e)
		}
	}
	runtime.GC()
	httpPh, err = h.httpPhase(ctx, "http "+k.name, r.cl, r.d, r.rss, k.path, bodies, refLines(refs))
	return storePh, httpPh, err
}

// httpPhase pushes bodies to path with the harness's clients.
func (h *harness) httpPhase(ctx context.Context, name string, cl *client, d *loadkit.Daemon, rss *rssSampler, path string, bodies [][]byte, lines func(int) int) (phase, error) {
	start := time.Now()
	ph, err := runPhase(ctx, name, len(bodies), h.opts.Clients, lines, meter{pid: d.PID, srv: h.srv},
		func(ctx context.Context, i int) (time.Duration, int, error) {
			return cl.push(ctx, path, bodies[i], lines(i))
		}, h.progress)
	ph.HTTP, ph.PeakRSS = true, rss.peak(start, time.Now())
	return ph, err
}

func count[T comparable](xs []T, v T) int {
	n := 0
	for _, x := range xs {
		if x == v {
			n++
		}
	}
	return n
}

// check compares what the daemon serves with the generator's recount:
// each model's prediction and label counts (GET /v1/models) and, for each
// window, its bounds, counts and matrix (GET /v1/models/{model}/windows).
// It returns each model's labeled predictions and how many windows it
// compared.
func (h *harness) check(ctx context.Context, cl *client, sc *scenario) (labeledBy []int64, checked int, err error) {
	fmt.Fprintln(h.progress, "checking the daemon's counts and windows against the events sent")
	var list struct {
		Models []api.ModelSummary `json:"models"`
	}
	if err := cl.getJSON(ctx, "/v1/models", &list); err != nil {
		return nil, 0, err
	}
	models := list.Models
	var problems []error
	bad := func(format string, args ...any) { problems = append(problems, fmt.Errorf(format, args...)) }
	wins := pushWindows()
	for m, name := range sc.models {
		wm, labeled, want := sc.recount(m, wins)
		labeledBy = append(labeledBy, labeled)
		i := slices.IndexFunc(models, func(s api.ModelSummary) bool { return s.Name == name })
		if i < 0 {
			bad("model %s missing from /v1/models", name)
			continue
		}
		if got := models[i]; got.Predictions != int64(sc.perModel) || got.Labeled != labeled {
			bad("model %s: /v1/models counts %d predictions, %d labeled; sent %d, %d", name, got.Predictions, got.Labeled, sc.perModel, labeled)
		}
		var mw api.ModelWindows
		if err := cl.getJSON(ctx, "/v1/models/"+url.PathEscape(name)+"/windows", &mw); err != nil {
			return labeledBy, checked, err
		}
		if mw.Watermark == nil || !mw.Watermark.Equal(wm) {
			bad("model %s: watermark %v, want %v", name, mw.Watermark, wm)
		}
		for k, win := range wins {
			j := slices.IndexFunc(mw.Windows, func(r api.WindowReport) bool { return r.Name == win.Name })
			if j < 0 {
				bad("model %s: window %s missing", name, win.Name)
				continue
			}
			checked++
			got := mw.Windows[j]
			from, to := win.Bounds(wm)
			if got.From == nil || got.To == nil || !got.From.Equal(from) || !got.To.Equal(to) {
				bad("model %s window %s: bounds %v–%v, want %v–%v", name, win.Name, got.From, got.To, from, to)
			}
			if got.Predictions != want[k].predictions || got.Labeled != want[k].labeled {
				bad("model %s window %s: %d predictions, %d labeled; want %d, %d", name, win.Name, got.Predictions, got.Labeled, want[k].predictions, want[k].labeled)
			}
			for a, actual := range got.Classes {
				for p, predicted := range got.Classes {
					if g, w := got.Matrix[a][p], want[k].matrix[[2]string{actual, predicted}]; g != w {
						bad("model %s window %s: cell (%s, %s) is %d, want %d", name, win.Name, actual, predicted, g, w)
					}
				}
			}
		}
	}
	if len(problems) > 0 {
		return labeledBy, checked, fmt.Errorf("the daemon disagrees with the events sent:\n%w", errors.Join(problems...))
	}
	return labeledBy, checked, nil
}

// checkStore compares the baseline store's counts with the events sent;
// labeled holds each model's labeled predictions.
func checkStore(ctx context.Context, st *pgstore.Store, sc *scenario, labeled []int64) error {
	infos, err := st.Models(ctx)
	if err != nil {
		return fmt.Errorf("read store models: %w", err)
	}
	for m, name := range sc.models {
		i := slices.IndexFunc(infos, func(x store.ModelInfo) bool { return x.Name == name })
		if i < 0 || infos[i].Predictions != int64(sc.perModel) || infos[i].Labeled != labeled[m] {
			return fmt.Errorf("baseline store: model %s does not hold %d predictions and %d labels", name, sc.perModel, labeled[m])
		}
	}
	return nil
}
