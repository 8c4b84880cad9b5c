package collector

import (
	"slices"
	"strings"
	"unicode/utf8"

	"github.com/classwatch/classwatch/windows/store"
)

// maxErrorBytes caps the text of one line's error, which may quote the
// line's own values.
const maxErrorBytes = 300

// item is one parsed, valid-so-far line; its prediction or label is at
// the same index of the batch's preds or labels.
type item struct {
	line int
	// classes names every class the line uses: predicted then score keys
	// (sorted), or actual.
	classes []string
}

// batch gathers the lines of one transaction. Its memory is proportional to
// its valid lines: rejected lines are counted, and only the first keep of
// them (by line) are kept with their error.
type batch struct {
	first, last int
	lines       int // non-blank lines
	// items and, by kind, preds or labels hold the valid-so-far lines.
	items  []item
	preds  []store.Prediction
	labels []store.Label
	// classBuf backs the items' class lists.
	classBuf []string

	// keep bounds rejected to the keep lowest lines; zero keeps all.
	keep int
	// rejected holds rejections, at most 2 × keep between trims.
	rejected []LineError
	// cutoff is, once rejected holds keep lines after a trim, the greatest
	// line among them: a later rejection of a greater line is not kept.
	cutoff    int
	nRejected int
	forbidden int
	// reasons counts rejections by metric reason; models counts them by
	// registered model ("" for a model not registered when judged).
	reasons map[string]int
	models  map[string]int
}

// model returns the model of item i.
func (b *batch) model(i int, k Kind) string {
	if k == Labels {
		return b.labels[i].Model
	}
	return b.preds[i].Model
}

// move copies item src over item dst, to filter the items in place.
func (b *batch) move(dst, src int, k Kind) {
	b.items[dst] = b.items[src]
	if k == Labels {
		b.labels[dst] = b.labels[src]
	} else {
		b.preds[dst] = b.preds[src]
	}
}

// truncate keeps the first n items.
func (b *batch) truncate(n int, k Kind) {
	b.items = b.items[:n]
	if k == Labels {
		b.labels = b.labels[:n]
	} else {
		b.preds = b.preds[:n]
	}
}

// rejectAll rejects every valid-so-far line of the batch for err, a store
// limit the batch as a whole passed.
func (b *batch) rejectAll(k Kind, err error) {
	for i, it := range b.items {
		b.reject(it.line, b.model(i, k), true, reasonStoreLimit, err)
	}
	b.truncate(0, k)
}

// reject records that line was rejected for reason. model is the model the
// line named; registered says whether it is registered, so that only
// registered names become metric label values.
func (b *batch) reject(line int, model string, registered bool, reason string, err error) {
	b.nRejected++
	if reason == reasonForbidden {
		b.forbidden++
	}
	if b.reasons == nil {
		b.reasons, b.models = map[string]int{}, map[string]int{}
	}
	b.reasons[reason]++
	if !registered {
		model = ""
	}
	if _, ok := b.models[model]; !ok {
		model = strings.Clone(model) // not a view of the whole line
	}
	b.models[model]++
	if !b.lists(line) {
		return
	}
	b.rejected = append(b.rejected, LineError{Line: line, Error: errorText(err), reason: reason})
	if b.keep > 0 && len(b.rejected) >= 2*b.keep {
		b.trimRejected()
	}
}

// lists reports whether a rejection of line would be kept with its error.
func (b *batch) lists(line int) bool {
	return b.keep == 0 || b.cutoff == 0 || line <= b.cutoff
}

// trimRejected sorts the kept rejections by line and, with keep set,
// drops all but the first keep.
func (b *batch) trimRejected() {
	slices.SortFunc(b.rejected, func(x, y LineError) int { return x.Line - y.Line })
	if b.keep > 0 && len(b.rejected) >= b.keep {
		clear(b.rejected[b.keep:])
		b.rejected = b.rejected[:b.keep]
		b.cutoff = b.rejected[b.keep-1].Line
	}
}

// errorText is err's text, cut to maxErrorBytes on a rune boundary.
func errorText(err error) string {
	s := err.Error()
	if len(s) <= maxErrorBytes {
		return s
	}
	cut := maxErrorBytes - len("…")
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return s[:cut] + "…"
}

// getBatch returns an empty batch, with the slices of a finished one when
// the pool holds one: a request of thousands of lines would otherwise grow
// them from nothing each time.
func (c *Collector) getBatch() *batch {
	if b, ok := c.batches.Get().(*batch); ok {
		return b
	}
	return &batch{}
}

// reset empties b for the next batch, keeping its slices and keep but none
// of the strings they pointed to.
func (b *batch) reset() {
	clear(b.items[:cap(b.items)])
	clear(b.preds[:cap(b.preds)])
	clear(b.labels[:cap(b.labels)])
	clear(b.classBuf[:cap(b.classBuf)])
	clear(b.rejected[:cap(b.rejected)])
	clear(b.reasons)
	clear(b.models)
	*b = batch{
		items: b.items[:0], preds: b.preds[:0], labels: b.labels[:0], classBuf: b.classBuf[:0],
		keep: b.keep, rejected: b.rejected[:0], reasons: b.reasons, models: b.models,
	}
}

// classList returns first followed by the other keys of scores, sorted,
// in space taken from classBuf.
func (b *batch) classList(first string, scores map[string]float64) []string {
	if cap(b.classBuf)-len(b.classBuf) < 1+len(scores) {
		// Earlier lists keep the old array; a reused batch starts with the
		// largest one.
		b.classBuf = make([]string, 0, max(1024, 2*cap(b.classBuf), 1+len(scores)))
	}
	start := len(b.classBuf)
	b.classBuf = append(b.classBuf, first)
	for s := range scores {
		if s != first {
			b.classBuf = append(b.classBuf, s)
		}
	}
	list := b.classBuf[start:len(b.classBuf):len(b.classBuf)]
	slices.Sort(list[1:])
	return list
}
