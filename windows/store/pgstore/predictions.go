package pgstore

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"math"
	"slices"
	"strconv"
	"time"
	"unicode/utf8"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/classwatch/classwatch/windows/store"
)

// keyBlock is how many prediction keys one nextval of
// prediction_key_blocks reserves.
const keyBlock = 1 << 16

// predLine is one line of a prediction batch.
type predLine struct {
	model  int32
	id     string
	at     time.Time
	bucket time.Time
	p      *store.Prediction
	pkey   int64
	terms  store.ScoreTerms // the score terms, when scored
	scored bool

	// Set per attempt.
	stored bool
	first  int            // index of the batch's first line with this (model, id)
	old    *storedContent // the stored prediction, for a first line not stored
}

// storedContent is what duplicates are judged against.
type storedContent struct {
	at                 time.Time
	segment, predicted string
	scores             map[string]float64
}

// same reports whether line p repeats content c: same predicted class,
// segment and scores, and the same at unless p's at was defaulted.
func (c storedContent) same(p *store.Prediction) bool {
	return c.predicted == p.Predicted && c.segment == p.Segment && maps.Equal(c.scores, p.Scores) &&
		(p.AtDefaulted || c.at.Equal(micro(p.At)))
}

// IngestPredictions stores a batch in one transaction; see store.Store.
//
// The batch is copied straight into predictions with COPY inside a
// savepoint: in the usual case every line is new and that one COPY both
// stores the batch and proves it new, through the primary key. If the key
// refuses a line (an id already stored, or repeated in the batch), the
// savepoint is rolled back, the stored content of the batch's ids is read
// in one statement, and only the first line of each new id is copied.
// Counts are summed in memory and upserted once per row. Early labels are
// looked for only when the model has any.
func (s *Store) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	res := store.PredictionResult{Outcomes: make([]store.PredictionOutcome, len(batch))}
	if len(batch) == 0 {
		return res, nil
	}
	names := make([]string, len(batch))
	for i := range batch {
		names[i] = batch[i].Model
	}
	ids, err := s.modelIDs(ctx, names)
	if err != nil {
		return res, err
	}
	lines, err := predLines(batch, ids)
	if err != nil {
		return res, err
	}
	var t *tally
	err = s.retry(ctx, func() error {
		return s.withDays(ctx, func() error {
			t = newTally()
			return s.inTx(ctx, func(c *pgx.Conn) error {
				return s.storePredictions(ctx, c, lines, sortedModels(ids), t)
			})
		})
	})
	if err != nil {
		return res, unavailable("ingest predictions", err)
	}
	for i := range lines {
		l := &lines[i]
		if l.stored {
			res.Outcomes[i] = store.PredictionStored
			continue
		}
		// A known id, or a repeat of an earlier line: judge the line against
		// the prediction that stands.
		f := &lines[l.first]
		c := storedContent{at: f.at, segment: f.p.Segment, predicted: f.p.Predicted, scores: f.p.Scores}
		if !f.stored {
			c = *f.old
		}
		res.Outcomes[i] = store.PredictionConflict
		if c.same(l.p) {
			res.Outcomes[i] = store.PredictionDuplicate
		}
	}
	res.Changes = t.changes(namesOf(ids))
	return res, nil
}

// predLines returns the lines of the batch.
func predLines(batch []store.Prediction, ids map[string]int32) ([]predLine, error) {
	lines := make([]predLine, len(batch))
	for i := range batch {
		p := &batch[i]
		if err := checkScores(p.Scores); err != nil {
			return nil, fmt.Errorf("prediction line %d: %w", i+1, err)
		}
		lines[i] = predLine{model: ids[p.Model], id: p.ID, at: micro(p.At), bucket: micro(p.Bucket), p: p}
		lines[i].terms, lines[i].scored = store.NewScoreTerms(p.Scores, p.Predicted)
	}
	return lines, nil
}

// checkScores refuses scores that JSON cannot carry.
func checkScores(scores map[string]float64) error {
	for k, v := range scores {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("score %q is %v: %w", k, v, errBadInput)
		}
	}
	return nil
}

// appendScores appends checked scores to b as a JSON object: keys in
// sorted order, numbers in Go's shortest form that reads back exactly
// (PostgreSQL keeps jsonb numbers as exact decimals, so the stored value is
// the float sent). It writes the JSON itself, into a reused buffer, because
// it runs for every line of every batch.
func appendScores(b []byte, scores map[string]float64) []byte {
	var small [8]string
	keys := small[:0]
	for k := range scores {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	b = append(b, '{')
	for i, k := range keys {
		if i > 0 {
			b = append(b, ',')
		}
		if plainKey(k) {
			b = append(b, '"')
			b = append(b, k...)
			b = append(b, '"')
		} else {
			q, _ := json.Marshal(k) // a string always encodes
			b = append(b, q...)
		}
		b = append(b, ':')
		b = strconv.AppendFloat(b, scores[k], 'g', -1, 64)
	}
	return append(b, '}')
}

// plainKey reports whether k needs no escaping inside a JSON string.
func plainKey(k string) bool {
	for i := 0; i < len(k); i++ {
		if c := k[i]; c < 0x20 || c == '"' || c == '\\' || c >= utf8.RuneSelf {
			return false
		}
	}
	return true
}

// storePredictions is one attempt at the prediction transaction.
func (s *Store) storePredictions(ctx context.Context, tx *pgx.Conn, lines []predLine, models []int32, t *tally) error {
	for i := range lines {
		lines[i].stored, lines[i].first, lines[i].old = false, i, nil
	}
	// First the shared early-label lock of each model: a label batch that
	// holds an early label for one of these ids takes it exclusively, so
	// either its early label is committed before this batch looks for early
	// labels, or it waits and then finds this batch's predictions.
	var (
		b      pgx.Batch
		starts []int64
		early  bool
	)
	b.Queue(sqlBegin)
	b.Queue(sqlNoJIT)
	b.Queue(sqlLockModelsShare, s.keys.early, models)
	b.Queue(sqlHasEarly, models).QueryRow(func(r pgx.Row) error { return r.Scan(&early) })
	b.Queue(sqlKeyBlocks, (len(lines)+keyBlock-1)/keyBlock).Query(func(rows pgx.Rows) error {
		var err error
		starts, err = pgx.CollectRows(rows, pgx.RowTo[int64])
		return err
	})
	if slices.ContainsFunc(lines, func(l predLine) bool { return l.scored }) {
		queueClasses(&b, models, t)
	}
	b.Queue(sqlSavepoint)
	if err := tx.SendBatch(ctx, &b).Close(); err != nil {
		return err
	}
	for i := range lines {
		lines[i].pkey = starts[i/keyBlock]*keyBlock + int64(i%keyBlock)
	}

	fresh := make([]*predLine, len(lines))
	for i := range lines {
		fresh[i] = &lines[i]
	}
	err := copyPredictions(ctx, tx, fresh)
	if pgErr := (*pgconn.PgError)(nil); errors.As(err, &pgErr) && pgErr.Code == "23505" {
		// Some id is known, or repeated within the batch: start over from
		// the savepoint with the first line of each id that is new. Should
		// a concurrent batch store one of them meanwhile, this copy fails
		// too and the whole attempt is retried.
		if _, err := tx.Exec(ctx, sqlRollbackToSave); err != nil {
			return err
		}
		if fresh, err = newLines(ctx, tx, firstLines(lines)); err != nil {
			return err
		}
		err = copyPredictions(ctx, tx, fresh)
	}
	if err != nil {
		return err
	}
	if len(fresh) == 0 {
		_, err := tx.Exec(ctx, sqlCommit)
		return err
	}
	countFresh(fresh, t)
	if early {
		var v versionRows
		if err := takeEarly(ctx, tx, fresh, &v, t); err != nil {
			return err
		}
		if err := s.needDays(v.days()); err != nil {
			return err
		}
		if err := v.copy(ctx, tx); err != nil {
			return err
		}
	}
	b = pgx.Batch{}
	t.queue(&b)
	b.Queue(sqlCommit)
	return tx.SendBatch(ctx, &b).Close()
}

// countFresh marks the new lines stored and counts them.
func countFresh(fresh []*predLine, t *tally) {
	for _, l := range fresh {
		l.stored = true
		t.addPredicted(l.model, l.bucket, l.p.Segment, l.p.Predicted, l.at)
		if l.scored {
			t.addScored(l.model, l.bucket, l.p.Segment, l.p.Predicted, l.terms)
		}
	}
}

// queueClasses queues the read of the models' classes into t, for the
// bin-0 counts of the call's Changes.
func queueClasses(b *pgx.Batch, models []int32, t *tally) {
	b.Queue(sqlModelClasses, models).Query(func(rows pgx.Rows) error {
		var (
			id   int32
			name string
		)
		_, err := pgx.ForEachRow(rows, []any{&id, &name}, func() error {
			t.classes[id] = append(t.classes[id], name)
			return nil
		})
		return err
	})
}

// copyPredictions copies lines into predictions. The rows are encoded as
// pgx streams them, so that this work overlaps the server's.
func copyPredictions(ctx context.Context, tx conn, lines []*predLine) error {
	if len(lines) == 0 {
		return nil
	}
	row := make([]any, 8)
	var scores []byte // pgx copies each row's values out before asking for the next
	src := pgx.CopyFromSlice(len(lines), func(i int) ([]any, error) {
		l := lines[i]
		row[0], row[1], row[2], row[3] = l.pkey, l.bucket, l.at, l.model
		row[4], row[5], row[6], row[7] = l.id, l.p.Segment, l.p.Predicted, nil
		if len(l.p.Scores) > 0 {
			scores = appendScores(scores[:0], l.p.Scores)
			row[7] = scores
		}
		return row, nil
	})
	_, err := tx.CopyFrom(ctx, pgx.Identifier{"predictions"},
		[]string{"pkey", "bucket", "at", "model_id", "id", "segment", "predicted", "scores"}, src)
	return err
}

// firstLines marks each line's first line of the same (model, id) and
// returns the first lines.
func firstLines(lines []predLine) []*predLine {
	type key struct {
		model int32
		id    string
	}
	index := make(map[key]int, len(lines))
	var out []*predLine
	for i := range lines {
		k := key{lines[i].model, lines[i].id}
		if j, ok := index[k]; ok {
			lines[i].first = j
			continue
		}
		index[k] = i
		out = append(out, &lines[i])
	}
	return out
}

// newLines reads the stored content of the lines' keys, records it on the
// known lines and returns the others.
func newLines(ctx context.Context, tx conn, lines []*predLine) ([]*predLine, error) {
	type key struct {
		model int32
		id    string
	}
	models := make([]int32, len(lines))
	idList := make([]string, len(lines))
	index := make(map[key]*predLine, len(lines))
	for i, l := range lines {
		models[i], idList[i] = l.model, l.id
		index[key{l.model, l.id}] = l
	}
	rows, err := tx.Query(ctx, sqlStoredContent, models, idList)
	if err != nil {
		return nil, err
	}
	var (
		k      key
		c      storedContent
		scores []byte
	)
	_, err = pgx.ForEachRow(rows, []any{&k.model, &k.id, &c.at, &c.segment, &c.predicted, &scores}, func() error {
		old := c
		old.scores = nil
		if scores != nil {
			var err error
			if old.scores, err = store.ParseScores(scores); err != nil {
				return fmt.Errorf("decode stored scores: %w", err)
			}
		}
		index[k].old = &old
		return nil
	})
	if err != nil {
		return nil, err
	}
	var fresh []*predLine
	for _, l := range lines {
		if l.old == nil {
			fresh = append(fresh, l)
		}
	}
	return fresh, nil
}

// takeEarly removes the early labels of the new predictions and adds them
// to v as label versions: each such prediction's current label is its
// greatest (at, actual) version, counted in t.
func takeEarly(ctx context.Context, tx conn, fresh []*predLine, v *versionRows, t *tally) error {
	type key struct {
		model int32
		id    string
	}
	models := make([]int32, len(fresh))
	idList := make([]string, len(fresh))
	index := make(map[key]*predLine, len(fresh))
	for i, l := range fresh {
		models[i], idList[i] = l.model, l.id
		index[key{l.model, l.id}] = l
	}
	rows, err := tx.Query(ctx, sqlTakeEarly, models, idList)
	if err != nil {
		return err
	}
	type best struct {
		at     time.Time
		actual string
	}
	current := map[*predLine]best{}
	seqs := map[*predLine]int32{}
	var (
		k      key
		at     time.Time
		actual string
	)
	_, err = pgx.ForEachRow(rows, []any{&k.model, &k.id, &at, &actual}, func() error {
		l := index[k]
		seqs[l]++
		v.add(l.model, l.bucket, l.pkey, seqs[l], false, at, actual)
		if b, ok := current[l]; !ok || later(at, actual, b.at, b.actual) {
			current[l] = best{at, actual}
		}
		return nil
	})
	if err != nil {
		return err
	}
	for l, b := range current {
		t.addCell(l.model, l.bucket, l.p.Segment, b.actual, l.p.Predicted, 1)
		if l.scored {
			t.moveLabel(l.model, l.bucket, l.p.Segment, l.p.Predicted, l.terms, "", false, b.actual)
		}
	}
	return nil
}

// later reports whether real version (at, actual) ranks above (curAt,
// curActual): a greater at, or the same at and a greater actual.
func later(at time.Time, actual string, curAt time.Time, curActual string) bool {
	return at.After(curAt) || (at.Equal(curAt) && actual > curActual)
}
