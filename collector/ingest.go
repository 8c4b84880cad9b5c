package collector

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// LineError is one rejected line.
type LineError struct {
	// Line is 1-based: the physical line of an NDJSON input, the element
	// index + 1 of a JSON array.
	Line  int    `json:"line"`
	Error string `json:"error"`
	// reason is the metric label of the rejection.
	reason string
}

// Result counts the lines of an ingest. Accepted lines were newly stored,
// duplicates were already known; the three add up to the non-blank lines
// read.
type Result struct {
	Accepted   int         `json:"accepted"`
	Duplicates int         `json:"duplicates"`
	Rejected   []LineError `json:"rejected"`
	// RejectedOmitted counts the rejected lines past the first
	// MaxListedRejections, which Rejected does not list: accepted +
	// duplicates + len(rejected) + rejected_omitted is the number of lines.
	RejectedOmitted int `json:"rejected_omitted"`
	// forbidden counts rejections because the token may not write the
	// line's model.
	forbidden int
}

// MaxListedRejections is how many rejected lines Submit lists in a Result.
const MaxListedRejections = 1000

// check refuses a Kind that is neither Predictions nor Labels.
func (k Kind) check() error {
	if k != Predictions && k != Labels {
		return fmt.Errorf("unknown kind %d", int(k))
	}
	return nil
}

// Progress reports a bulk ingest after each committed batch.
type Progress struct {
	// Line is the last line the committed batches cover; a failed run may
	// be resumed after it.
	Line       int
	Accepted   int
	Duplicates int
	Rejected   int
}

// BatchOptions tune Ingest.
type BatchOptions struct {
	Format Format
	// BatchLines is the number of non-blank lines per transaction; zero
	// means DefaultBatchLines.
	BatchLines int
	// Progress, when set, is called after each committed batch.
	Progress func(Progress)
	// Rejected, when set, is called after each committed batch with its
	// rejected lines in order, all of them; the Result lists only the first
	// MaxListedRejections.
	Rejected func([]LineError)
}

// StoreError reports a batch the store could not commit; nothing of that
// batch was kept.
type StoreError struct {
	// FirstLine and LastLine bound the lines of the failed batch.
	FirstLine, LastLine int
	Err                 error
}

// Error names the failed batch's lines and the cause.
func (e *StoreError) Error() string {
	return fmt.Sprintf("commit lines %d-%d: %v", e.FirstLine, e.LastLine, e.Err)
}

// Unwrap returns the store's error.
func (e *StoreError) Unwrap() error { return e.Err }

// storeError reports that b could not be committed; the cause always
// wraps store.ErrUnavailable.
func (b *batch) storeError(err error) *StoreError {
	if !errors.Is(err, store.ErrUnavailable) {
		err = fmt.Errorf("%w: %w", store.ErrUnavailable, err)
	}
	return &StoreError{FirstLine: b.first, LastLine: b.last, Err: err}
}

// Kind says what a body holds.
type Kind int

// Kinds.
const (
	// Predictions are prediction lines, as POST /v1/predictions takes.
	Predictions Kind = iota
	// Labels are label lines, as POST /v1/labels takes.
	Labels
)

// String returns the endpoint label of the kind.
func (k Kind) String() string {
	if k == Labels {
		return "labels"
	}
	return "predictions"
}

// ingestRun is how one ingest treats its input.
type ingestRun struct {
	kind Kind
	// source is the source label of classwatch_source_lines_total.
	source string
	token  *tokenHash // nil: every model allowed
	// batchLines is the number of lines per transaction; 0 is one
	// transaction for the whole input.
	batchLines int
	// longLineFatal makes an over-long line end the ingest instead of
	// being rejected alone.
	longLineFatal bool
	// listLimit caps the rejected lines listed in the Result; the rest are
	// counted in RejectedOmitted.
	listLimit int
	// keep, when not zero, bounds the rejections a batch lists (its
	// memory); zero lists every rejection of the batch to rejected.
	keep     int
	rejected func([]LineError)
	progress func(Progress)
}

// Ingest reads a file of kind k from r and stores it in transactions of
// opts.BatchLines lines, judging each line as Submit does (no token
// applies); it is Submit for inputs too large for one transaction, such as
// a backfill. An over-long line is rejected alone. On a store failure it
// returns what the committed batches did together with a *StoreError
// naming the failed batch's lines.
func (c *Collector) Ingest(ctx context.Context, k Kind, r io.Reader, opts BatchOptions) (Result, error) {
	if err := k.check(); err != nil {
		return Result{Rejected: []LineError{}}, err
	}
	run := ingestRun{
		kind: k, source: "file", batchLines: opts.BatchLines, listLimit: MaxListedRejections,
		rejected: opts.Rejected, progress: opts.Progress,
	}
	if run.batchLines <= 0 {
		run.batchLines = DefaultBatchLines
	}
	return c.ingest(ctx, newLineSource(r, opts.Format, c.limits.MaxLineBytes), run)
}

// ingest runs the shared path: decode, validate, resolve models and
// classes, commit, count.
func (c *Collector) ingest(ctx context.Context, src lineSource, run ingestRun) (Result, error) {
	res := Result{Rejected: []LineError{}}
	b := c.getBatch()
	b.keep = run.keep
	now := c.now()
	for {
		line, data, err := src.next()
		if errors.Is(err, io.EOF) {
			break
		}
		var tooLong *LineTooLongError
		switch {
		case errors.As(err, &tooLong) && !run.longLineFatal:
			b.reject(line, "", false, reasonInvalid, fmt.Errorf("line is longer than the %d-byte limit", tooLong.Limit))
		case err != nil:
			return res, err
		default:
			c.parse(b, run.kind, line, data, now)
		}
		if b.lines == 0 {
			b.first = line
		}
		b.lines++
		b.last = line
		if run.batchLines > 0 && b.lines >= run.batchLines {
			if err := c.flush(ctx, b, run, now, &res); err != nil {
				return res, err
			}
			b.reset()
			now = c.now()
		}
	}
	if b.lines > 0 {
		if err := c.flush(ctx, b, run, now, &res); err != nil {
			return res, err
		}
	}
	b.reset()
	c.batches.Put(b)
	return res, nil
}

// firstByte returns the first byte of data that is not JSON white space.
func firstByte(data []byte) byte {
	for _, c := range data {
		if c != ' ' && c != '\t' && c != '\r' && c != '\n' {
			return c
		}
	}
	return 0
}

// errNotJSON rejects a line that is not a JSON object and will not be
// listed.
var errNotJSON = errors.New("not a JSON object")

// parse decodes one line into the batch, as an item or a rejection.
func (c *Collector) parse(b *batch, k Kind, line int, data []byte, now time.Time) {
	if !b.lists(line) && (firstByte(data) != '{' || !json.Valid(data)) {
		// Its error would not be listed: skip building it, so that a body
		// of garbage lines costs little more than its bytes.
		b.reject(line, "", false, reasonInvalid, errNotJSON)
		return
	}
	if k == Labels {
		l, err := parseLabel(data, now, c.limits.MaxFuture)
		if err != nil {
			b.reject(line, l.Model, c.state(l.Model) != nil, reasonInvalid, err)
			return
		}
		b.labels = append(b.labels, l)
		b.items = append(b.items, item{line: line, classes: b.classList(l.Actual, nil)})
		return
	}
	p, err := parsePrediction(data, now, c.limits.MaxFuture)
	if err != nil {
		b.reject(line, p.Model, c.state(p.Model) != nil, reasonInvalid, err)
		return
	}
	b.preds = append(b.preds, p)
	b.items = append(b.items, item{line: line, classes: b.classList(p.Predicted, p.Scores)})
}

// resolve checks each item's token permission, model and classes,
// registering what the policies allow, and fills in prediction buckets.
// Rejected items leave b.items. Only a store failure is returned.
func (c *Collector) resolve(ctx context.Context, b *batch, k Kind, tok *tokenHash, now time.Time) error {
	var order []string
	needs := map[string][]string{}
	needed := map[string]map[string]bool{}
	states := stateCache{c: c}
	allowed := 0
	for i, it := range b.items {
		m := b.model(i, k)
		if tok != nil && !tok.allows(m) {
			b.reject(it.line, m, states.get(m) != nil, reasonForbidden, fmt.Errorf("token %q may not write model %q", tok.name, m))
			continue
		}
		b.move(allowed, i, k)
		allowed++
		st := states.get(m)
		for _, cl := range it.classes {
			if st != nil && st.set[cl] {
				continue
			}
			if needed[m] == nil {
				needed[m] = map[string]bool{}
				order = append(order, m)
			}
			if !needed[m][cl] {
				needed[m][cl] = true
				needs[m] = append(needs[m], cl)
			}
		}
	}
	b.truncate(allowed, k)

	refused := map[string]map[string]bool{}
	for _, m := range order {
		r, err := c.ensure(ctx, m, needs[m])
		switch {
		case errors.Is(err, errTooManyModels):
			r = map[string]bool{modelRefused: true}
		case err != nil:
			return err
		}
		refused[m] = r
	}

	states = stateCache{c: c}
	kept := 0
	for i, it := range b.items {
		m := b.model(i, k)
		st := states.get(m)
		if err := c.check(st, it.classes, m, refused[m]); err != nil {
			reason := reasonUnknownClass
			var ce *classError
			switch {
			case errors.Is(err, errTooManyModels):
				reason = reasonTooManyModels
			case !errors.As(err, &ce):
				reason = reasonUnknownModel
			case ce.tooMany:
				reason = reasonTooManyClasses
			}
			b.reject(it.line, m, st != nil, reason, err)
			continue
		}
		if k == Predictions {
			p := &b.preds[i]
			p.Bucket = windows.BucketStart(p.At, st.policy.Bucket)
			if err := tooOld(p, st.policy, now); err != nil {
				b.reject(it.line, m, true, reasonTooOld, err)
				continue
			}
		}
		b.move(kept, i, k)
		kept++
	}
	b.truncate(kept, k)
	return nil
}

// tooOld refuses a prediction in a bucket that retention has already
// purged, or would purge at its next run: it would be kept only until then,
// and every distinct old day costs the store a partition.
func tooOld(p *store.Prediction, policy ModelPolicy, now time.Time) error {
	if policy.Retention <= 0 {
		return nil
	}
	if cutoff := retentionCutoff(policy, now); p.Bucket.Before(cutoff) {
		return fmt.Errorf(`"at": %s is older than the model's retention of %s (buckets before %s are purged)`,
			p.At.Format(time.RFC3339), policy.Retention, cutoff.Format(time.RFC3339))
	}
	return nil
}

// stateCache memoizes Collector.state over one pass through a batch, whose
// lines mostly name a single model.
type stateCache struct {
	c     *Collector
	model string
	st    *modelState
	valid bool
}

func (s *stateCache) get(model string) *modelState {
	if !s.valid || model != s.model {
		s.model, s.st, s.valid = model, s.c.state(model), true
	}
	return s.st
}

// classError is a line naming a class its model does not have.
type classError struct {
	msg     string
	tooMany bool
}

func (e *classError) Error() string { return e.msg }

// modelRefused marks, in a refused-classes set, a model refused as a whole.
// It cannot collide with a class: class names are never empty.
const modelRefused = ""

// check reports whether an item's model and classes are registered; st is
// the model's state, nil if unknown.
func (c *Collector) check(st *modelState, classes []string, model string, refused map[string]bool) error {
	if st == nil {
		if refused[modelRefused] {
			return fmt.Errorf("unknown model %q: registering it would pass max_models (%d): %w", model, c.maxModels, errTooManyModels)
		}
		if c.autoModels {
			if err := ValidModelName(model); err != nil {
				return err
			}
		}
		return fmt.Errorf("unknown model %q", model)
	}
	for _, cl := range classes {
		switch {
		case st.set[cl]:
		case refused[cl]:
			return &classError{tooMany: true, msg: fmt.Sprintf("class %q would pass max_classes (%d) of model %q", cl, st.policy.MaxClasses, model)}
		default:
			return &classError{msg: fmt.Sprintf("class %q is not registered for model %q", cl, model)}
		}
	}
	return nil
}

// flush resolves and commits one batch and adds its outcome to res.
func (c *Collector) flush(ctx context.Context, b *batch, run ingestRun, now time.Time, res *Result) error {
	if err := c.resolve(ctx, b, run.kind, run.token, now); err != nil {
		return b.storeError(err)
	}
	var latest map[string]time.Time
	endpoint := run.kind.String()
	accepted, duplicates := res.Accepted, res.Duplicates
	if len(b.items) > 0 {
		var err error
		if run.kind == Labels {
			err = c.commitLabels(ctx, b, now, res)
		} else {
			latest, err = c.commitPredictions(ctx, b, now, res)
		}
		switch {
		case errors.Is(err, store.ErrLimit):
			// The same batch would fail the same way again: its lines are
			// rejected, so no client or stream retries it for ever.
			b.rejectAll(run.kind, err)
		case err != nil:
			if ctx.Err() == nil {
				c.metrics.storeErrors.WithLabelValues("ingest_" + endpoint).Inc()
			}
			return b.storeError(err)
		}
	}

	for reason, n := range b.reasons {
		c.metrics.rejectedLines.WithLabelValues(endpoint, reason).Add(float64(n))
	}
	if run.kind == Labels {
		for m, n := range b.models {
			c.metrics.labelsReceived.WithLabelValues(m, resultRejected).Add(float64(n))
		}
	}
	c.metrics.sourceLines(run.source, endpoint, res.Accepted-accepted, res.Duplicates-duplicates, b.nRejected)
	b.trimRejected()
	if run.rejected != nil && len(b.rejected) > 0 {
		run.rejected(b.rejected)
	}
	listed := b.rejected[:min(len(b.rejected), max(run.listLimit-len(res.Rejected), 0))]
	res.Rejected = append(res.Rejected, listed...)
	res.RejectedOmitted += b.nRejected - len(listed)
	res.forbidden += b.forbidden
	c.metrics.batchLines.WithLabelValues(endpoint).Observe(float64(b.lines))

	c.noteLatest(latest)
	if run.progress != nil {
		run.progress(Progress{Line: b.last, Accepted: res.Accepted, Duplicates: res.Duplicates, Rejected: len(res.Rejected) + res.RejectedOmitted})
	}
	return nil
}

// commitPredictions stores the batch's predictions in one transaction and
// returns each model's greatest time among those it newly stored.
func (c *Collector) commitPredictions(ctx context.Context, b *batch, now time.Time, res *Result) (map[string]time.Time, error) {
	in := b.preds
	out, err := c.store.IngestPredictions(ctx, in, now)
	if err != nil {
		return nil, fmt.Errorf("ingest predictions: %w", err)
	}
	if len(out.Outcomes) != len(in) {
		return nil, fmt.Errorf("ingest predictions: %d outcomes for %d lines", len(out.Outcomes), len(in))
	}
	latest := map[string]time.Time{}
	received := counterCache{vec: c.metrics.predictionsReceived}
	for i, o := range out.Outcomes {
		p := &in[i]
		switch o {
		case store.PredictionStored:
			res.Accepted++
			if p.At.After(latest[p.Model]) {
				latest[p.Model] = p.At
			}
		case store.PredictionDuplicate:
			res.Duplicates++
		case store.PredictionConflict:
			b.reject(b.items[i].line, p.Model, true, reasonConflict,
				fmt.Errorf("prediction %s already recorded with different content; the first one stands", p.ID))
			continue
		}
		received.get(p.Model).Inc()
	}
	return latest, nil
}

// counterCache memoizes the counter of one label value over a batch, whose
// lines mostly name a single model.
type counterCache struct {
	vec   *prometheus.CounterVec
	value string
	ctr   prometheus.Counter
}

func (cc *counterCache) get(value string) prometheus.Counter {
	if cc.ctr == nil || value != cc.value {
		cc.value, cc.ctr = value, cc.vec.WithLabelValues(value)
	}
	return cc.ctr
}

// commitLabels applies the batch's labels in one transaction.
func (c *Collector) commitLabels(ctx context.Context, b *batch, now time.Time, res *Result) error {
	in := b.labels
	out, err := c.store.IngestLabels(ctx, in, now)
	if err != nil {
		return fmt.Errorf("ingest labels: %w", err)
	}
	if len(out.Outcomes) != len(in) {
		return fmt.Errorf("ingest labels: %d outcomes for %d lines", len(out.Outcomes), len(in))
	}
	type result struct {
		model   string
		outcome store.LabelOutcome
	}
	received := map[result]int{}
	for i, o := range out.Outcomes {
		if o == store.LabelDuplicate {
			res.Duplicates++
		} else {
			res.Accepted++
		}
		received[result{in[i].Model, o}]++
	}
	for r, n := range received {
		c.metrics.labelsReceived.WithLabelValues(r.model, r.outcome.String()).Add(float64(n))
	}
	return nil
}
