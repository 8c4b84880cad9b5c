package sqlitestore

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"time"

	"github.com/classwatch/classwatch/windows/store"
	"modernc.org/sqlite"
	sqlite3 "modernc.org/sqlite/lib"
)

// IngestPredictions stores a batch in one transaction; see store.Store.
//
// The lines are inserted by multi-row INSERT statements of up to a hundred
// rows (see predictionInserter.insert); a line that met a stored prediction
// with its key is judged by one read of that row. Predicted-class counts,
// cells and model totals are summed in memory and written once per key at
// the end, so a batch of a thousand predictions in one bucket updates one
// count row.
func (s *Store) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	res := store.PredictionResult{Outcomes: make([]store.PredictionOutcome, len(batch))}
	if len(batch) == 0 {
		return res, nil
	}
	tx, err := s.beginIngest(ctx, "begin prediction batch")
	if err != nil {
		return res, err
	}
	defer tx.Rollback()

	acc := newAccumulator()
	lines, allScores, err := s.predictionLines(ctx, tx, acc, batch)
	if err != nil {
		return res, err
	}

	ins := predictionInserter{tx: tx, received: micros(now)}
	for i := 0; i < len(batch); {
		size := chunkFor(len(batch) - i)
		if err := ins.insert(ctx, batch[i:i+size], lines[i:i+size], allScores); err != nil {
			return res, err
		}
		i += size
	}

	content := tx.stmt(ctx, sqlPredictionContent)
	st := storedLines{tx: tx, acc: acc, hasEarlyStmt: tx.stmt(ctx, sqlHasEarly), hasEarly: map[int64]bool{}}
	for i, p := range batch {
		l := &lines[i]
		scores := l.scoreValue(allScores)
		if !l.stored {
			same, err := sameContent(ctx, content, l.model, p, l.at, scores)
			if err != nil {
				return res, err
			}
			if same {
				res.Outcomes[i] = store.PredictionDuplicate
			} else {
				res.Outcomes[i] = store.PredictionConflict
			}
			continue
		}
		res.Outcomes[i] = store.PredictionStored
		if err := st.add(ctx, l, p); err != nil {
			return res, err
		}
	}
	if err := acc.flush(ctx, tx); err != nil {
		return res, err
	}
	if err := tx.Commit(); err != nil {
		return res, unavailable("commit prediction batch", err)
	}
	res.Changes = acc.changes()
	return res, nil
}

// predictionLines derives each line's predictionLine. One string holds
// every line's scores; each line binds a substring of it.
func (s *Store) predictionLines(ctx context.Context, tx *ingestTx, acc *accumulator, batch []store.Prediction) ([]predictionLine, string, error) {
	lines := make([]predictionLine, len(batch))
	var buf []byte
	for i, p := range batch {
		id, err := acc.model(ctx, s, tx, p.Model)
		if err != nil {
			return nil, "", fmt.Errorf("prediction line %d: %w", i+1, err)
		}
		start := len(buf)
		if buf, err = appendScores(buf, p.Scores); err != nil {
			return nil, "", fmt.Errorf("prediction line %d: %w", i+1, err)
		}
		lines[i] = predictionLine{model: id, at: micros(p.At), bucket: micros(p.Bucket), scores: [2]int{start, len(buf)}}
	}
	return lines, string(buf), nil
}

// storedLines counts the lines a prediction batch stored and joins their
// early labels.
type storedLines struct {
	tx           *ingestTx
	acc          *accumulator
	hasEarlyStmt *sql.Stmt
	hasEarly     map[int64]bool
	join         *earlyJoiner // bound when the first model with early labels shows up
}

// add counts the stored line l and joins its early labels, if any.
func (st *storedLines) add(ctx context.Context, l *predictionLine, p store.Prediction) error {
	acc := st.acc
	acc.addPredicted(l.model, l.bucket, p.Segment, p.Predicted, 1)
	acc.stored(l.model, l.at)
	terms, scored := store.NewScoreTerms(p.Scores, p.Predicted)
	if scored {
		classes, ok := acc.classes[l.model]
		if !ok {
			var err error
			if classes, err = classesOf(ctx, st.tx, l.model); err != nil {
				return err
			}
		}
		acc.addScored(l.model, l.bucket, p.Segment, p.Predicted, terms, classes)
	}
	early, checked := st.hasEarly[l.model]
	if !checked {
		if err := st.hasEarlyStmt.QueryRowContext(ctx, l.model).Scan(&early); err != nil {
			return unavailable("look for early labels", err)
		}
		st.hasEarly[l.model] = early
	}
	if !early {
		return nil
	}
	if st.join == nil {
		st.join = newEarlyJoiner(ctx, st.tx)
	}
	actual, joined, err := st.join.join(ctx, l.model, p.ID)
	if err != nil || !joined {
		return err
	}
	acc.addCell(l.model, l.bucket, p.Segment, actual, p.Predicted, 1)
	acc.labeled(l.model, 1)
	if scored {
		acc.moveLabel(l.model, l.bucket, p.Segment, p.Predicted, terms, "", false, actual)
	}
	return nil
}

// predictionLine is what IngestPredictions derives from one line: the model
// id, the encoded times, the span of the line's scores in the batch's score
// text (empty: no scores) and whether the insert stored the line.
type predictionLine struct {
	model, at, bucket int64
	scores            [2]int
	stored            bool
}

// scoreValue returns the line's scores as bound and compared: the canonical
// JSON text, or NULL for none.
func (l *predictionLine) scoreValue(all string) sql.NullString {
	if l.scores[0] == l.scores[1] {
		return sql.NullString{}
	}
	return sql.NullString{String: all[l.scores[0]:l.scores[1]], Valid: true}
}

// predictionInserter runs the prediction inserts of one batch, reusing its
// argument slice from chunk to chunk.
type predictionInserter struct {
	tx       *ingestTx
	received int64
	single   *sql.Stmt
	chunks   map[int]*sql.Stmt
	args     []any
}

// insert stores the lines of one chunk and marks those stored. A chunk of
// several lines goes in as one statement that has no conflict clause: when
// a key is already stored, before the batch or by an earlier line of it,
// SQLite backs out the whole statement (leaving the transaction and its
// earlier statements as they were) and insert stores the chunk again line
// by line, skipping the stored keys. A batch that brings no known key, the
// usual one, thus pays one statement per chunk.
func (in *predictionInserter) insert(ctx context.Context, batch []store.Prediction, lines []predictionLine, allScores string) error {
	args := in.args[:0]
	for i, p := range batch {
		l := &lines[i]
		var scores any
		if v := l.scoreValue(allScores); v.Valid {
			scores = v.String
		}
		args = append(args, l.model, p.ID, l.at, l.bucket, p.Segment, p.Predicted, scores, in.received)
	}
	in.args = args
	if len(batch) > 1 {
		st, ok := in.chunks[len(batch)]
		if !ok {
			if in.chunks == nil {
				in.chunks = map[int]*sql.Stmt{}
			}
			st = in.tx.stmt(ctx, insertPredictionsSQL(len(batch)))
			in.chunks[len(batch)] = st
		}
		_, err := st.ExecContext(ctx, args...)
		if err == nil {
			for i := range lines {
				lines[i].stored = true
			}
			return nil
		}
		if !keyConflict(err) {
			return unavailable("insert predictions", err)
		}
	}
	if in.single == nil {
		in.single = in.tx.stmt(ctx, sqlInsertPrediction)
	}
	for i := range lines {
		n, err := affected(in.single.ExecContext(ctx, args[8*i:8*i+8]...))
		if err != nil {
			return unavailable("insert prediction", err)
		}
		lines[i].stored = n == 1
	}
	return nil
}

// keyConflict reports whether err is SQLite's refusal of a key already
// stored.
func keyConflict(err error) bool {
	var e *sqlite.Error
	return errors.As(err, &e) && e.Code() == sqlite3.SQLITE_CONSTRAINT_PRIMARYKEY
}

// sameContent reports whether p repeats the stored prediction (model, p.ID).
func sameContent(ctx context.Context, content *sql.Stmt, model int64, p store.Prediction, at int64, scores sql.NullString) (bool, error) {
	var (
		storedAt           int64
		segment, predicted string
		storedScores       sql.NullString
	)
	if err := content.QueryRowContext(ctx, model, p.ID).Scan(&storedAt, &segment, &predicted, &storedScores); err != nil {
		return false, unavailable("read stored prediction", err)
	}
	return segment == p.Segment && predicted == p.Predicted && storedScores == scores &&
		(p.AtDefaulted || storedAt == at), nil
}

// appendScores appends the canonical JSON of scores to b, or nothing for
// none. The text is exactly what encoding/json gives (keys sorted, each
// float the shortest text that reads back exactly, in the same notation), so
// equal maps give equal text; plain keys and finite scores are written
// here without reflection, anything else goes through encoding/json.
func appendScores(b []byte, scores map[string]float64) ([]byte, error) {
	if len(scores) == 0 {
		return b, nil
	}
	var small [8]string
	keys := small[:0]
	for k, v := range scores {
		if !plainKey(k) || math.IsInf(v, 0) || math.IsNaN(v) {
			return appendScoresJSON(b, scores)
		}
		keys = append(keys, k)
	}
	slices.Sort(keys)
	b = append(b, '{')
	for i, k := range keys {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '"')
		b = append(b, k...)
		b = append(b, '"', ':')
		b = appendFloat(b, scores[k])
	}
	return append(b, '}'), nil
}

// appendScoresJSON is appendScores through encoding/json.
func appendScoresJSON(b []byte, scores map[string]float64) ([]byte, error) {
	j, err := json.Marshal(scores)
	if err != nil {
		return b, fmt.Errorf("encode scores: %w", err)
	}
	return append(b, j...), nil
}

// plainKey reports whether encoding/json writes k between quotes as it is:
// printable ASCII other than the quote, the backslash and the characters it
// escapes for HTML (<, >, &).
func plainKey(k string) bool {
	for i := 0; i < len(k); i++ {
		c := k[i]
		if c < 0x20 || c > 0x7e || c == '"' || c == '\\' || c == '<' || c == '>' || c == '&' {
			return false
		}
	}
	return true
}

// appendFloat writes a finite float64 as encoding/json does: the shortest
// text that reads back exactly, in exponent notation (with at least one
// exponent digit) below 1e-6 and from 1e21 on, plain notation otherwise.
func appendFloat(b []byte, f float64) []byte {
	format := byte('f')
	if abs := math.Abs(f); abs != 0 && (abs < 1e-6 || abs >= 1e21) {
		format = 'e'
	}
	b = strconv.AppendFloat(b, f, format, -1, 64)
	if format == 'e' {
		// Shorten e-09 to e-9.
		if n := len(b); n >= 4 && b[n-4] == 'e' && b[n-3] == '-' && b[n-2] == '0' {
			b[n-2] = b[n-1]
			b = b[:n-1]
		}
	}
	return b
}

// earlyJoiner moves a new prediction's early labels into its label history.
type earlyJoiner struct {
	early, deleteEarly, insertVersion, setLabel *sql.Stmt
}

func newEarlyJoiner(ctx context.Context, tx *ingestTx) *earlyJoiner {
	return &earlyJoiner{early: tx.stmt(ctx, sqlEarlyFor), deleteEarly: tx.stmt(ctx, sqlDeleteEarlyFor), insertVersion: tx.stmt(ctx, sqlInsertVersion), setLabel: tx.stmt(ctx, sqlSetLabel)}
}

// join moves the early labels of (model, id), if any, into label_versions
// and makes the greatest (at, actual) the current label, which it returns.
func (j *earlyJoiner) join(ctx context.Context, model int64, id string) (string, bool, error) {
	type version struct {
		at, received int64
		actual       string
	}
	rows, err := j.early.QueryContext(ctx, model, id)
	if err != nil {
		return "", false, unavailable("read early labels", err)
	}
	var vs []version
	for rows.Next() {
		var v version
		if err := rows.Scan(&v.at, &v.actual, &v.received); err != nil {
			rows.Close()
			return "", false, unavailable("read early labels", err)
		}
		vs = append(vs, v)
	}
	if err := errors.Join(rows.Err(), rows.Close()); err != nil {
		return "", false, unavailable("read early labels", err)
	}
	if len(vs) == 0 {
		return "", false, nil
	}
	best := vs[0]
	for _, v := range vs {
		if _, err := j.insertVersion.ExecContext(ctx, model, id, 0, v.at, v.actual, v.received); err != nil {
			return "", false, unavailable("join early label", err)
		}
		if later(v.at, v.actual, best.at, best.actual) {
			best = v
		}
	}
	if _, err := j.deleteEarly.ExecContext(ctx, model, id); err != nil {
		return "", false, unavailable("join early label", err)
	}
	if _, err := j.setLabel.ExecContext(ctx, best.actual, best.at, 0, model, id); err != nil {
		return "", false, unavailable("join early label", err)
	}
	return best.actual, true, nil
}

// later reports whether real version (at, actual) ranks above (curAt,
// curActual): a greater at, or the same at and a greater actual.
func later(at int64, actual string, curAt int64, curActual string) bool {
	return at > curAt || (at == curAt && actual > curActual)
}
