// Package api serves classwatch's read side over HTTP: the models and their
// rolling windows, the confusion matrix and metrics of any past period (as
// known now or as known at an earlier time), health and readiness, and the
// pages people read: the on-call overview, a page per model and the
// self-contained audit report (README "Pages and the audit report").
//
// Routes (registered by API.Register):
//
//	GET /v1/models                      models with classes, watermark, counts, windows
//	GET /v1/models/{model}/windows      every window: bounds, matrix, metrics
//	GET /v1/models/{model}/matrix       any bucket-aligned period: ?from=T&to=T[&segment=S][&as_of=T]
//	GET /v1/models/{model}/report       the audit report (HTML) of a period: same parameters
//	GET /healthz                        the process answers
//	GET /readyz                         the store answers and every Options.Ready check passes (else 503)
//	GET /                               the on-call overview (HTML)
//	GET /models/{model}                 one model's page (HTML): ?segment=S
//
// Times are RFC 3339 in UTC. Undefined ratios are null, never 0. Errors are
// {"error": "..."} with 400 for a request at fault, 404 for an unknown
// model and 503 when the store cannot be read.
package api

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"html/template"
	"log/slog"
	"net/http"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// DefaultConfidence is the interval level used when Options leaves it zero.
const DefaultConfidence = 0.95

// readyTimeout bounds the store ping behind /readyz.
const readyTimeout = 2 * time.Second

// Options configure an API.
type Options struct {
	Store   store.Store
	Tracker *windows.Tracker
	// Confidence is the level of the Wilson intervals; 0 means 0.95.
	Confidence float64
	// Logger receives failures the client only sees as 5xx; nil discards.
	Logger *slog.Logger
	// Now returns the current time; nil means time.Now.
	Now func() time.Time
	// History is how far before the watermark a model page's history
	// reaches; 0 means DefaultHistory.
	History time.Duration
	// Ready are further conditions of /readyz, such as a stream source
	// being connected; each returns nil when ready, else an error whose
	// message names no host or user (it is shown to the caller).
	Ready []func(ctx context.Context) error
}

// API serves the read endpoints. It is safe for concurrent use.
type API struct {
	store      store.Store
	tracker    *windows.Tracker
	confidence float64
	log        *slog.Logger
	now        func() time.Time
	history    time.Duration
	pages      pageTemplates
	ready      []func(ctx context.Context) error
	labels     labelTimes
}

// pageTemplates are the parsed HTML pages.
type pageTemplates struct {
	overview, model, errPage *template.Template
}

// New returns an API over opts.Store and opts.Tracker, both required.
func New(opts Options) *API {
	a := &API{
		store:      opts.Store,
		tracker:    opts.Tracker,
		confidence: cmp.Or(opts.Confidence, DefaultConfidence),
		log:        opts.Logger,
		now:        opts.Now,
		history:    cmp.Or(opts.History, DefaultHistory),
		ready:      opts.Ready,
		pages: pageTemplates{
			overview: parsePage("overview", overviewContent),
			model:    parsePage("model", modelContent),
			errPage:  parsePage("error", errorContent),
		},
	}
	if a.log == nil {
		a.log = slog.New(slog.DiscardHandler)
	}
	if a.now == nil {
		a.now = time.Now
	}
	return a
}

// Register adds the API's routes to mux.
func (a *API) Register(mux *http.ServeMux) {
	mux.HandleFunc("GET /v1/models", a.handleModels)
	mux.HandleFunc("GET /v1/models/{model}/windows", a.handleWindows)
	mux.HandleFunc("GET /v1/models/{model}/matrix", a.handleMatrix)
	mux.HandleFunc("GET /v1/models/{model}/report", a.handleReport)
	mux.HandleFunc("GET /healthz", a.handleHealth)
	mux.HandleFunc("GET /readyz", a.handleReady)
	mux.HandleFunc("GET /{$}", a.handleOverview)
	mux.HandleFunc("GET /models/{model}", a.handleModelPage)
}

// ModelSummary is one entry of GET /v1/models.
type ModelSummary struct {
	Name    string   `json:"name"`
	Classes []string `json:"classes"`
	Bucket  string   `json:"bucket"`
	// Watermark is null before the model's first prediction (event clock).
	Watermark          *time.Time     `json:"watermark"`
	LatestPredictionAt *time.Time     `json:"latest_prediction_at"`
	Predictions        int64          `json:"predictions"`
	Labeled            int64          `json:"labeled"`
	LabelCoverage      *float64       `json:"label_coverage"`
	Windows            []WindowBounds `json:"windows"`
}

// WindowBounds describe a configured window at the current watermark.
type WindowBounds struct {
	Name   string `json:"name"`
	Length string `json:"length"`
	Lag    string `json:"lag"`
	// From and To bound the buckets covered, starts in [From, To); null
	// before the model's first prediction.
	From *time.Time `json:"from"`
	To   *time.Time `json:"to"`
}

// WindowReport is one entry of GET /v1/models/{model}/windows.
type WindowReport struct {
	WindowBounds
	Figures
}

// ModelWindows is the body of GET /v1/models/{model}/windows.
type ModelWindows struct {
	Model     string         `json:"model"`
	Watermark *time.Time     `json:"watermark"`
	Windows   []WindowReport `json:"windows"`
}

// models merges the store's models with those the tracker knows but the
// store has not seen yet (configured, no traffic), sorted by name.
func (a *API) models(ctx context.Context) ([]ModelSummary, error) {
	infos, err := a.store.Models(ctx)
	if err != nil {
		return nil, err
	}
	byName := make(map[string]store.ModelInfo, len(infos))
	for _, info := range infos {
		byName[info.Name] = info
	}
	for _, name := range a.tracker.Models() {
		if _, ok := byName[name]; !ok {
			info := store.ModelInfo{Name: name}
			if views := a.tracker.Views(name); len(views) > 0 {
				info.Classes = views[0].Matrix.Classes()
			}
			byName[name] = info
		}
	}
	out := make([]ModelSummary, 0, len(byName))
	for _, info := range byName {
		out = append(out, a.summary(info))
	}
	slices.SortFunc(out, func(x, y ModelSummary) int { return cmp.Compare(x.Name, y.Name) })
	return out, nil
}

func (a *API) summary(info store.ModelInfo) ModelSummary {
	opts := a.tracker.Options(info.Name)
	wm, ok := a.tracker.Watermark(info.Name)
	if !ok {
		wm = windows.Watermark(info.LatestAt, opts.Bucket)
	}
	s := ModelSummary{
		Name:               info.Name,
		Classes:            info.Classes,
		Bucket:             windows.FormatDuration(opts.Bucket),
		Watermark:          optTime(wm),
		LatestPredictionAt: optTime(info.LatestAt),
		Predictions:        info.Predictions,
		Labeled:            info.Labeled,
		Windows:            make([]WindowBounds, len(opts.Windows)),
	}
	if s.Classes == nil {
		s.Classes = []string{}
	}
	if info.Predictions > 0 {
		c := float64(info.Labeled) / float64(info.Predictions)
		s.LabelCoverage = &c
	}
	for i, w := range opts.Windows {
		s.Windows[i] = bounds(w, wm)
	}
	return s
}

func bounds(w windows.Window, wm time.Time) WindowBounds {
	b := WindowBounds{Name: w.Name, Length: windows.FormatDuration(w.Length), Lag: windows.FormatDuration(w.Lag)}
	if !wm.IsZero() {
		from, to := w.Bounds(wm)
		b.From, b.To = &from, &to
	}
	return b
}

func optTime(t time.Time) *time.Time {
	if t.IsZero() {
		return nil
	}
	t = t.UTC()
	return &t
}

func (a *API) handleModels(w http.ResponseWriter, r *http.Request) {
	models, err := a.models(r.Context())
	if err != nil {
		a.fail(w, r, err)
		return
	}
	writeJSON(w, http.StatusOK, struct {
		Models []ModelSummary `json:"models"`
	}{models})
}

func (a *API) handleWindows(w http.ResponseWriter, r *http.Request) {
	model := r.PathValue("model")
	views := a.tracker.Views(model)
	wm, known := a.tracker.Watermark(model)
	if !known {
		// The tracker may not have loaded a model the store knows.
		known, err := a.storeKnows(r.Context(), model)
		if err != nil {
			a.fail(w, r, err)
			return
		}
		if !known {
			writeError(w, http.StatusNotFound, "unknown model "+quote(model))
			return
		}
	}
	out := ModelWindows{Model: model, Watermark: optTime(wm), Windows: make([]WindowReport, len(views))}
	for i, v := range views {
		out.Windows[i] = WindowReport{WindowBounds: bounds(v.Window, v.Watermark), Figures: FiguresOf(v.Matrix, v.Metrics(a.confidence), a.confidence)}
	}
	writeJSON(w, http.StatusOK, out)
}

func (a *API) storeKnows(ctx context.Context, model string) (bool, error) {
	infos, err := a.store.Models(ctx)
	if err != nil {
		return false, err
	}
	return slices.ContainsFunc(infos, func(m store.ModelInfo) bool { return m.Name == model }), nil
}

func (a *API) handleMatrix(w http.ResponseWriter, r *http.Request) {
	q, err := a.matrixQuery(r)
	if err != nil {
		writeError(w, http.StatusBadRequest, err.Error())
		return
	}
	rep, err := MatrixReport(r.Context(), a.store, q, a.now(), a.confidence)
	if err != nil {
		a.fail(w, r, err)
		return
	}
	writeJSON(w, http.StatusOK, rep)
}

// matrixQuery reads the model, from, to, as_of and segment of a matrix or
// report request; it returns a *RequestError for a malformed parameter.
func (a *API) matrixQuery(r *http.Request) (MatrixQuery, error) {
	q := MatrixQuery{Model: r.PathValue("model"), Bucket: a.tracker.Options(r.PathValue("model")).Bucket}
	params := r.URL.Query()
	var err error
	if q.From, err = parseTime(params, "from", true); err != nil {
		return q, err
	}
	if q.To, err = parseTime(params, "to", true); err != nil {
		return q, err
	}
	if params.Has("as_of") {
		asOf, err := parseTime(params, "as_of", false)
		if err != nil {
			return q, err
		}
		q.AsOf = &asOf
	}
	if params.Has("segment") {
		seg := params.Get("segment")
		q.Segment = &seg
	}
	if ref := a.tracker.Options(q.Model).ReferenceWindow; ref != "" {
		if v, ok := a.tracker.View(q.Model, ref); ok {
			q.Reference = &windows.Reference{Matrix: v.Matrix, Scores: v.Scores}
		}
	}
	return q, nil
}

func parseTime(params map[string][]string, name string, required bool) (time.Time, error) {
	vals := params[name]
	if len(vals) == 0 || vals[0] == "" {
		if required {
			return time.Time{}, badRequest("%s is required (an RFC 3339 time such as 2026-03-01T12:00:00Z)", name)
		}
		return time.Time{}, badRequest("%s is empty: give an RFC 3339 time such as 2026-03-01T12:00:00Z", name)
	}
	t, err := time.Parse(time.RFC3339Nano, vals[0])
	if err != nil {
		return time.Time{}, badRequest("%s %s is not an RFC 3339 time such as 2026-03-01T12:00:00Z", name, quote(vals[0]))
	}
	return t.UTC(), nil
}

func (a *API) handleHealth(w http.ResponseWriter, r *http.Request) {
	writeJSON(w, http.StatusOK, map[string]string{"status": "ok"})
}

func (a *API) handleReady(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), readyTimeout)
	defer cancel()
	if err := a.store.Ping(ctx); err != nil {
		// The cause stays in the log: it may name hosts and users.
		a.log.WarnContext(r.Context(), "not ready: store ping failed", "err", err)
		writeError(w, http.StatusServiceUnavailable, "store not ready")
		return
	}
	for _, check := range a.ready {
		if err := check(ctx); err != nil {
			a.log.WarnContext(r.Context(), "not ready", "err", err)
			writeError(w, http.StatusServiceUnavailable, err.Error())
			return
		}
	}
	writeJSON(w, http.StatusOK, map[string]string{"status": "ready"})
}

// fail answers err with the status it calls for, logging server-side
// failures once here.
func (a *API) fail(w http.ResponseWriter, r *http.Request, err error) {
	switch {
	case isRequestError(err):
		writeError(w, http.StatusBadRequest, err.Error())
	case errors.Is(err, store.ErrUnknownModel):
		writeError(w, http.StatusNotFound, "unknown model "+quote(r.PathValue("model")))
	case errors.Is(err, context.Canceled):
		// The client went away; nobody reads the answer.
	case errors.Is(err, store.ErrUnavailable):
		a.log.WarnContext(r.Context(), "read failed: store unavailable", "path", r.URL.Path, "err", err)
		w.Header().Set("Retry-After", "5")
		writeError(w, http.StatusServiceUnavailable, "store unavailable")
	default:
		a.log.ErrorContext(r.Context(), "read failed", "path", r.URL.Path, "err", err)
		writeError(w, http.StatusInternalServerError, "internal error")
	}
}

func quote(s string) string {
	b, _ := json.Marshal(s) // a string always marshals
	return string(b)
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	body, err := json.Marshal(v)
	if err != nil {
		// Only a NaN or infinity could get here, and Compute never
		// returns one; answer rather than send half a body.
		status = http.StatusInternalServerError
		body = []byte(`{"error":"internal error: cannot encode the response"}`)
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	w.Write(append(body, '\n'))
}

func writeError(w http.ResponseWriter, status int, msg string) {
	writeJSON(w, status, map[string]string{"error": msg})
}
