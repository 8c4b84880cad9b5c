package collector

import (
	"cmp"
	"context"
	"crypto/sha256"
	"errors"
	"fmt"
	"log/slog"
	"maps"
	"slices"
	"sync"
	"time"
	"unicode/utf8"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// Defaults applied by New to zero Limits fields.
const (
	DefaultMaxBodyBytes = 8 << 20
	DefaultMaxLineBytes = 256 << 10
	DefaultMaxInFlight  = 4
	DefaultQueueWait    = 5 * time.Second
	DefaultMaxFuture    = 15 * time.Minute
	DefaultRetryAfter   = 5 * time.Second
	DefaultBatchLines   = 1000
	DefaultMinBodyRate  = 16 << 10
	DefaultBodyGrace    = 10 * time.Second
)

// Field length limits, in bytes.
const (
	maxIDBytes      = 256
	maxSegmentBytes = 128
	maxClassBytes   = 128
)

// ModelPolicy is how the collector treats one model's lines and what the
// maintenance jobs do for it.
type ModelPolicy struct {
	Name string
	// Classes are registered, in this order, before the model's first
	// batch; they fix the first axes of its matrix.
	Classes []string
	// Bucket is the width of the model's buckets; zero means windows.DefaultBucket.
	Bucket time.Duration
	// LabelTimeout and DefaultLabel, when both set, give every prediction
	// still unlabeled LabelTimeout after its time an implied DefaultLabel.
	LabelTimeout time.Duration
	DefaultLabel string
	// EarlyLabelTTL drops early labels whose prediction has not arrived
	// this long after they were received; zero keeps them.
	EarlyLabelTTL time.Duration
	// Retention drops raw predictions and their label versions in buckets
	// that ended this long ago; cells stay. Zero keeps them.
	Retention time.Duration
	// AutoRegister registers classes not yet known instead of rejecting
	// their lines, as long as the model has at most MaxClasses classes.
	AutoRegister bool
	// MaxClasses caps the model's class list; zero means no cap.
	MaxClasses int
}

// Token is one bearer token allowed to push.
type Token struct {
	// Name identifies the token in errors and logs; it is not secret.
	Name string
	// Secret is the bearer value clients send.
	Secret string
	// Models the token may write; empty means every model.
	Models []string
}

// String describes the token without its secret.
func (t Token) String() string { return fmt.Sprintf("token %s (models %v)", t.Name, t.Models) }

// GoString is String, so that %#v does not print the secret either.
func (t Token) GoString() string { return t.String() }

// Limits bound the work one request may cause.
type Limits struct {
	// MaxBodyBytes caps a request body (after gzip decoding).
	MaxBodyBytes int64
	// MaxLineBytes caps one NDJSON line or one JSON array element.
	MaxLineBytes int
	// MaxInFlight is how many batches may be decoded and committed at once.
	MaxInFlight int
	// QueueWait is how long a request waits for an in-flight slot before
	// it is answered 503.
	QueueWait time.Duration
	// MaxFuture is how far ahead of the receive time an "at" may lie;
	// negative means no limit.
	MaxFuture time.Duration
	// RetryAfter is the Retry-After sent with a 503.
	RetryAfter time.Duration
	// MinBodyRate is the slowest average rate, in bytes per second on the
	// wire, at which a request body must arrive once BodyGrace has passed;
	// a slower body is answered 408. Negative means no minimum.
	MinBodyRate int64
	// BodyGrace is how long a body may take before MinBodyRate applies.
	BodyGrace time.Duration
	// MaxBufferedBytes caps the request bodies held in memory at once, read
	// before they take an in-flight slot; past it a request is answered 503.
	// Zero means 2 × MaxInFlight × MaxBodyBytes.
	MaxBufferedBytes int64
}

// Store is what the collector needs of a store (windows/store.Store has
// it). The daemon passes a windows.TrackedStore, which applies each
// committed change to the rolling windows and each class list to their
// axes before the call returns; data flows from the collector into the
// store and the windows, never back.
type Store interface {
	EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error)
	Models(ctx context.Context) ([]store.ModelInfo, error)
	IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error)
	IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error)
	ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error)
	ExpireEarlyLabels(ctx context.Context, model string, ttl time.Duration, now time.Time) (int64, error)
	PurgeRaw(ctx context.Context, model string, cutoff time.Time) (int64, error)
}

// Options configure a Collector.
type Options struct {
	// Store is where batches are written; required.
	Store Store
	// Models are the configured models.
	Models []ModelPolicy
	// Defaults is the policy of models that are not configured: those
	// registered through AutoRegisterModels, and for the maintenance jobs
	// any other model the store knows. Name and Classes are ignored.
	Defaults ModelPolicy
	// AutoRegisterModels registers unknown models under Defaults instead of
	// rejecting their lines. Such a model always auto-registers its classes,
	// since it has none configured.
	AutoRegisterModels bool
	// MaxModels caps how many models the store may hold before
	// AutoRegisterModels stops registering new ones; zero means no cap.
	// Every model adds series to the exported metrics.
	MaxModels int
	// Tokens, when not empty, are required on every request.
	Tokens []Token
	Limits Limits
	// Registerer receives the collector's metrics; required.
	Registerer prometheus.Registerer
	// Logger defaults to discarding.
	Logger *slog.Logger
	// Now is the clock for receive times; defaults to time.Now.
	Now func() time.Time
}

// Collector validates and ingests predictions and labels. It is safe for
// concurrent use by multiple goroutines.
type Collector struct {
	store      Store
	configured map[string]ModelPolicy
	defaults   ModelPolicy
	autoModels bool
	maxModels  int
	tokens     []tokenHash
	limits     Limits
	log        *slog.Logger
	now        func() time.Time
	metrics    *metrics
	// slots holds one element per running batch (MaxInFlight capacity).
	slots chan struct{}
	// bodies tracks the request bodies being read.
	bodies bodyReads
	// batches recycles the *batch of finished ingests.
	batches sync.Pool

	// ensureMu serializes registration so that two batches bringing the
	// same new class register it once and the store sees each growth
	// once, in order.
	ensureMu sync.Mutex
	// mu guards models and latest. A modelState is never changed once
	// published; growth replaces it.
	mu     sync.RWMutex
	models map[string]*modelState
	latest map[string]time.Time
}

// modelState is the cached, registered view of a model.
type modelState struct {
	policy  ModelPolicy
	classes []string
	set     map[string]bool
}

func newModelState(p ModelPolicy, classes []string) *modelState {
	st := &modelState{policy: p, classes: classes, set: make(map[string]bool, len(classes))}
	for _, c := range classes {
		st.set[c] = true
	}
	return st
}

type tokenHash struct {
	name   string
	sum    [sha256.Size]byte
	models map[string]bool // nil: every model
}

func (t *tokenHash) allows(model string) bool { return t.models == nil || t.models[model] }

// ValidModelName reports whether name may name a model: 1 to 128 bytes of
// letters, digits, '.', '_', ':' and '-', starting with a letter or digit.
func ValidModelName(name string) error {
	switch {
	case name == "":
		return errors.New("model name is empty")
	case len(name) > 128:
		return fmt.Errorf("model name %.20q… is longer than 128 bytes", name)
	case !nameChars(name):
		return fmt.Errorf("model name %q may only hold letters, digits, '.', '_', ':' and '-', starting with a letter or digit", name)
	}
	return nil
}

// nameChars reports whether s starts with a letter or digit and holds only
// letters, digits, '.', '_', ':' and '-': a model name appears in URL paths
// and metric labels.
func nameChars(s string) bool {
	for i := 0; i < len(s); i++ {
		b := s[i]
		alnum := 'a' <= b && b <= 'z' || 'A' <= b && b <= 'Z' || '0' <= b && b <= '9'
		if !alnum && (i == 0 || b != '.' && b != '_' && b != ':' && b != '-') {
			return false
		}
	}
	return true
}

// ValidClassName reports whether name may name a class: 1 to 128 bytes.
func ValidClassName(name string) error {
	switch {
	case name == "":
		return errors.New("class name is empty")
	case len(name) > maxClassBytes:
		return fmt.Errorf("class name %.20q… is longer than %d bytes", name, maxClassBytes)
	case !utf8.ValidString(name):
		return fmt.Errorf("class name %q is not valid UTF-8", name)
	}
	return checkText("class name", name)
}

// New checks opts and builds a Collector; it does no I/O. Call Prepare
// before serving to register the configured models eagerly.
func New(opts Options) (*Collector, error) {
	if opts.Store == nil {
		return nil, errors.New("collector needs a store")
	}
	if opts.Registerer == nil {
		return nil, errors.New("collector needs a prometheus registerer")
	}
	l := opts.Limits
	l.MaxBodyBytes = cmp.Or(l.MaxBodyBytes, DefaultMaxBodyBytes)
	l.MaxLineBytes = cmp.Or(l.MaxLineBytes, DefaultMaxLineBytes)
	l.MaxInFlight = cmp.Or(l.MaxInFlight, DefaultMaxInFlight)
	l.QueueWait = cmp.Or(l.QueueWait, DefaultQueueWait)
	l.MaxFuture = cmp.Or(l.MaxFuture, DefaultMaxFuture)
	l.RetryAfter = cmp.Or(l.RetryAfter, DefaultRetryAfter)
	l.MinBodyRate = cmp.Or(l.MinBodyRate, DefaultMinBodyRate)
	l.BodyGrace = cmp.Or(l.BodyGrace, DefaultBodyGrace)
	l.MaxBufferedBytes = cmp.Or(l.MaxBufferedBytes, 2*int64(l.MaxInFlight)*l.MaxBodyBytes)
	if l.MaxBodyBytes < 0 || l.MaxLineBytes < 0 || l.MaxInFlight < 0 || l.QueueWait < 0 || l.RetryAfter < 0 ||
		l.BodyGrace < 0 || l.MaxBufferedBytes < 0 || opts.MaxModels < 0 {
		return nil, errors.New("collector limits must not be negative")
	}
	c := &Collector{
		store:      opts.Store,
		configured: make(map[string]ModelPolicy, len(opts.Models)),
		defaults:   withDefaults(opts.Defaults),
		autoModels: opts.AutoRegisterModels,
		maxModels:  opts.MaxModels,
		limits:     l,
		log:        cmp.Or(opts.Logger, slog.New(slog.DiscardHandler)),
		now:        opts.Now,
		slots:      make(chan struct{}, l.MaxInFlight),
		models:     map[string]*modelState{},
		latest:     map[string]time.Time{},
	}
	if c.now == nil {
		c.now = time.Now
	}
	c.defaults.Name, c.defaults.Classes = "", nil
	for i, p := range opts.Models {
		if err := checkPolicy(p); err != nil {
			return nil, fmt.Errorf("model %d: %w", i, err)
		}
		if _, dup := c.configured[p.Name]; dup {
			return nil, fmt.Errorf("model %q is configured twice", p.Name)
		}
		c.configured[p.Name] = withDefaults(p)
	}
	for i, t := range opts.Tokens {
		if t.Secret == "" {
			return nil, fmt.Errorf("token %d (%s) has an empty secret", i, t.Name)
		}
		th := tokenHash{name: t.Name, sum: sha256.Sum256([]byte(t.Secret))}
		if len(t.Models) > 0 {
			th.models = make(map[string]bool, len(t.Models))
			for _, m := range t.Models {
				th.models[m] = true
			}
		}
		c.tokens = append(c.tokens, th)
	}
	var err error
	if c.metrics, err = newMetrics(opts.Registerer); err != nil {
		return nil, err
	}
	return c, nil
}

func withDefaults(p ModelPolicy) ModelPolicy {
	p.Bucket = cmp.Or(p.Bucket, windows.DefaultBucket)
	p.Classes = slices.Clone(p.Classes)
	return p
}

func checkPolicy(p ModelPolicy) error {
	if err := ValidModelName(p.Name); err != nil {
		return err
	}
	for _, cl := range p.Classes {
		if err := ValidClassName(cl); err != nil {
			return fmt.Errorf("model %s: %w", p.Name, err)
		}
	}
	if p.Bucket < 0 || p.LabelTimeout < 0 || p.EarlyLabelTTL < 0 || p.Retention < 0 || p.MaxClasses < 0 {
		return fmt.Errorf("model %s: durations and max classes must not be negative", p.Name)
	}
	if (p.DefaultLabel == "") != (p.LabelTimeout == 0) {
		return fmt.Errorf("model %s: label timeout and default label go together", p.Name)
	}
	if p.DefaultLabel != "" && !slices.Contains(p.Classes, p.DefaultLabel) {
		return fmt.Errorf("model %s: default label %q is not one of its classes", p.Name, p.DefaultLabel)
	}
	return nil
}

// Prepare registers every configured model and its classes in the store,
// loads the models the store already knows (auto-registered ones too when
// AutoRegisterModels). Lines for a model
// not prepared yet register it on first use, so Prepare is what makes
// configured models visible before their first line.
func (c *Collector) Prepare(ctx context.Context) error {
	names := slices.Sorted(maps.Keys(c.configured))
	for _, name := range names {
		if _, err := c.ensure(ctx, name, nil); err != nil {
			return fmt.Errorf("register model %s: %w", name, err)
		}
	}
	infos, err := c.store.Models(ctx)
	if err != nil {
		c.metrics.storeErrors.WithLabelValues("models").Inc()
		return fmt.Errorf("list models: %w", err)
	}
	for _, info := range infos {
		if _, ok := c.configured[info.Name]; !ok && c.autoModels {
			if _, err := c.ensure(ctx, info.Name, nil); err != nil {
				return fmt.Errorf("load model %s: %w", info.Name, err)
			}
		}
		if c.state(info.Name) != nil {
			c.noteLatest(map[string]time.Time{info.Name: info.LatestAt})
		}
	}
	return nil
}

// state returns the cached model, or nil.
func (c *Collector) state(model string) *modelState {
	c.mu.RLock()
	defer c.mu.RUnlock()
	return c.models[model]
}

// policyFor returns the policy of a model: its configuration, else the
// defaults.
func (c *Collector) policyFor(model string) ModelPolicy {
	if p, ok := c.configured[model]; ok {
		return p
	}
	p := c.defaults
	p.Name = model
	return p
}

// errTooManyModels refuses a new model past Options.MaxModels.
var errTooManyModels = errors.New("too many models")

// ensure makes sure model is registered and holds the classes in want when
// its policy allows, and returns the classes it refused because of
// MaxClasses. A model that is neither configured nor auto-registrable is
// left alone (its lines are rejected later); one past MaxModels gives
// errTooManyModels. Other errors are store failures.
func (c *Collector) ensure(ctx context.Context, model string, want []string) (refused map[string]bool, err error) {
	c.ensureMu.Lock()
	defer c.ensureMu.Unlock()

	old := c.state(model)
	var policy ModelPolicy
	switch p, ok := c.configured[model]; {
	case old != nil:
		policy = old.policy
	case ok:
		policy = p
	case c.autoModels && ValidModelName(model) == nil:
		policy = c.policyFor(model)
		policy.AutoRegister = true
		if err := c.checkModelCount(ctx, model); err != nil {
			return nil, err
		}
	default:
		return nil, nil
	}

	var add []string
	adding := map[string]bool{}
	if old == nil {
		for _, cl := range policy.Classes {
			if !adding[cl] {
				adding[cl] = true
				add = append(add, cl)
			}
		}
	}
	if policy.AutoRegister {
		for _, cl := range want {
			if (old == nil || !old.set[cl]) && !adding[cl] {
				adding[cl] = true
				add = append(add, cl)
			}
		}
	}
	// A model whose classes are not auto-registered still re-reads its list
	// when a line names a class it lacks: another replica with a newer
	// configuration may have added it.
	if old != nil && len(add) == 0 && len(want) == 0 {
		return nil, nil
	}

	var classes []string
	err = store.ErrTooManyClasses
	if policy.MaxClasses == 0 || len(add) <= policy.MaxClasses {
		classes, err = c.store.EnsureModel(ctx, model, add, policy.MaxClasses)
	}
	if errors.Is(err, store.ErrTooManyClasses) {
		classes, refused, err = c.registerWhatFits(ctx, model, add, policy.MaxClasses)
	}
	if err != nil {
		c.metrics.storeErrors.WithLabelValues("ensure_model").Inc()
		return nil, fmt.Errorf("ensure model %s: %w", model, err)
	}

	if old != nil && len(classes) == len(old.classes) {
		return refused, nil
	}
	st := newModelState(policy, slices.Clone(classes))
	c.mu.Lock()
	c.models[model] = st
	c.mu.Unlock()
	if old == nil {
		c.metrics.initModel(model)
	}
	return refused, nil
}

// registerWhatFits registers the classes of add one at a time, in order,
// until the model holds maxClasses; the rest are refused. It makes at most
// maxClasses + 1 store calls however long add is.
func (c *Collector) registerWhatFits(ctx context.Context, model string, add []string, maxClasses int) ([]string, map[string]bool, error) {
	classes, err := c.store.EnsureModel(ctx, model, nil, 0)
	if err != nil {
		return nil, nil, err
	}
	refused := map[string]bool{}
	for i, cl := range add {
		if slices.Contains(classes, cl) {
			continue
		}
		if len(classes) < maxClasses {
			grown, err := c.store.EnsureModel(ctx, model, []string{cl}, maxClasses)
			if err == nil {
				classes = grown
				continue
			}
			if !errors.Is(err, store.ErrTooManyClasses) {
				return nil, nil, err
			}
		}
		for _, r := range add[i:] {
			if !slices.Contains(classes, r) {
				refused[r] = true
			}
		}
		break
	}
	return classes, refused, nil
}

// checkModelCount refuses a new model when the store already holds
// MaxModels, counting those other replicas registered.
func (c *Collector) checkModelCount(ctx context.Context, model string) error {
	if c.maxModels == 0 {
		return nil
	}
	infos, err := c.store.Models(ctx)
	if err != nil {
		c.metrics.storeErrors.WithLabelValues("models").Inc()
		return fmt.Errorf("count models: %w", err)
	}
	if len(infos) < c.maxModels || slices.ContainsFunc(infos, func(m store.ModelInfo) bool { return m.Name == model }) {
		return nil
	}
	return errTooManyModels
}

// noteLatest raises the last-prediction gauges to the given times.
func (c *Collector) noteLatest(latest map[string]time.Time) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for m, t := range latest {
		if t.IsZero() || !t.After(c.latest[m]) {
			continue
		}
		c.latest[m] = t
		c.metrics.lastPrediction.WithLabelValues(m).Set(float64(t.UnixNano()) / 1e9)
	}
}
