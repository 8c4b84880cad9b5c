package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// IngestLabels applies a batch of label versions in one transaction; see
// store.Store.
//
// The batch runs in set-based steps, each cut into chunks of up to a
// hundred rows (see insertChunks): one read of the predictions the lines
// name, with their current labels; one insert of the lines' versions,
// whose RETURNING names the versions that were new; then each line is
// decided in memory, in line order; last, one update of the current labels
// that changed. A line whose prediction is unknown is held as an early
// label, one statement per line.
func (s *Store) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	res := store.LabelResult{Outcomes: make([]store.LabelOutcome, len(batch))}
	if len(batch) == 0 {
		return res, nil
	}
	tx, err := s.beginIngest(ctx, "begin label batch")
	if err != nil {
		return res, err
	}
	defer tx.Rollback()
	j := labelJoin{tx: tx, acc: newAccumulator(), received: micros(now), preds: map[predRef]*labelTarget{}}
	refs := make([]predRef, len(batch))
	for i, l := range batch {
		id, err := j.acc.model(ctx, s, tx, l.Model)
		if err != nil {
			return res, fmt.Errorf("label line %d: %w", i+1, err)
		}
		refs[i] = predRef{id, l.ID}
	}
	if err := j.lookup(ctx, refs); err != nil {
		return res, err
	}
	fresh, err := j.insertVersions(ctx, batch, refs)
	if err != nil {
		return res, err
	}
	early := tx.stmt(ctx, sqlInsertEarly)
	for i, l := range batch {
		tg := j.preds[refs[i]]
		if tg != nil {
			res.Outcomes[i] = j.decide(tg, refs[i], l, fresh)
			continue
		}
		n, err := affected(early.ExecContext(ctx, refs[i].model, l.ID, micros(l.At), l.Actual, j.received))
		if err != nil {
			return res, unavailable("insert early label", err)
		}
		res.Outcomes[i] = store.LabelEarly
		if n == 0 {
			res.Outcomes[i] = store.LabelDuplicate // this early version is already held
		}
	}
	if j.err != nil {
		return res, unavailable("label batch", j.err)
	}
	if err := j.setLabels(ctx); err != nil {
		return res, err
	}
	if err := j.acc.flush(ctx, tx); err != nil {
		return res, err
	}
	if err := tx.Commit(); err != nil {
		return res, unavailable("commit label batch", err)
	}
	res.Changes = j.acc.changes()
	return res, nil
}

// predRef names a prediction; versionRef one real label version of it.
type (
	predRef struct {
		model int64
		id    string
	}
	versionRef struct {
		predRef
		at     int64
		actual string
	}
)

// labelTarget is a known prediction a label batch touches: its join key
// and its current label, as the batch has changed it so far.
type labelTarget struct {
	bucket             int64
	segment, predicted string
	label              sql.NullString
	labelAt            int64
	implied            bool
	changed            bool           // the current label was set by this batch
	scores             sql.NullString // the stored scores' JSON
}

// labelJoin is one label batch's transaction and state.
type labelJoin struct {
	tx       *ingestTx
	acc      *accumulator
	received int64
	preds    map[predRef]*labelTarget // the known predictions the batch names
	args     []any
	err      error // the first failure of decide
}

// lookup reads the known predictions among refs, a chunk of ids of one
// model per statement.
func (j *labelJoin) lookup(ctx context.Context, refs []predRef) error {
	byModel := map[int64][]string{}
	seen := make(map[predRef]bool, len(refs))
	for _, r := range refs {
		if !seen[r] {
			seen[r] = true
			byModel[r.model] = append(byModel[r.model], r.id)
		}
	}
	for model, ids := range byModel {
		for lo := 0; lo < len(ids); {
			size := chunkFor(len(ids) - lo)
			args := append(j.args[:0], model)
			for _, id := range ids[lo : lo+size] {
				args = append(args, id)
			}
			j.args = args
			if err := j.readTargets(ctx, model, lookupLabelsSQL(size), args); err != nil {
				return err
			}
			lo += size
		}
	}
	return nil
}

// readTargets runs one lookup statement and records what it finds.
func (j *labelJoin) readTargets(ctx context.Context, model int64, query string, args []any) error {
	rows, err := j.tx.stmt(ctx, query).QueryContext(ctx, args...)
	if err != nil {
		return unavailable("look up predictions", err)
	}
	defer rows.Close()
	for rows.Next() {
		var (
			id            string
			tg            labelTarget
			labelAt, impl sql.NullInt64
		)
		if err := rows.Scan(&id, &tg.bucket, &tg.segment, &tg.predicted, &tg.label, &labelAt, &impl, &tg.scores); err != nil {
			return unavailable("look up predictions", err)
		}
		tg.labelAt, tg.implied = labelAt.Int64, impl.Int64 == 1
		j.preds[predRef{model, id}] = &tg
	}
	if err := rows.Err(); err != nil {
		return unavailable("look up predictions", err)
	}
	return nil
}

// insertVersions inserts the versions of the lines whose prediction is
// known and returns those that were new.
func (j *labelJoin) insertVersions(ctx context.Context, batch []store.Label, refs []predRef) (map[versionRef]bool, error) {
	var lines []int
	for i := range batch {
		if j.preds[refs[i]] != nil {
			lines = append(lines, i)
		}
	}
	fresh := make(map[versionRef]bool, len(lines))
	for lo := 0; lo < len(lines); {
		size := chunkFor(len(lines) - lo)
		args := j.args[:0]
		for _, i := range lines[lo : lo+size] {
			args = append(args, refs[i].model, refs[i].id, micros(batch[i].At), batch[i].Actual, j.received)
		}
		j.args = args
		rows, err := j.tx.stmt(ctx, insertVersionsSQL(size)).QueryContext(ctx, args...)
		if err != nil {
			return nil, unavailable("insert label versions", err)
		}
		for rows.Next() {
			var v versionRef
			if err := rows.Scan(&v.model, &v.id, &v.at, &v.actual); err != nil {
				rows.Close()
				return nil, unavailable("insert label versions", err)
			}
			fresh[v] = true
		}
		if err := errors.Join(rows.Err(), rows.Close()); err != nil {
			return nil, unavailable("insert label versions", err)
		}
		lo += size
	}
	return fresh, nil
}

// decide applies line l to its known prediction tg and returns its
// outcome. A version is new only at its first line (fresh forgets it
// then). A new real version becomes current when there is no version yet,
// when the current one is implied (a real version always wins), or when it
// ranks above the current real one.
func (j *labelJoin) decide(tg *labelTarget, ref predRef, l store.Label, fresh map[versionRef]bool) store.LabelOutcome {
	at := micros(l.At)
	v := versionRef{ref, at, l.Actual}
	if !fresh[v] {
		return store.LabelDuplicate
	}
	delete(fresh, v)
	if tg.label.Valid && !tg.implied && !later(at, l.Actual, tg.labelAt, tg.label.String) {
		return store.LabelDuplicate
	}
	old := tg.label
	tg.label, tg.labelAt, tg.implied, tg.changed = sql.NullString{String: l.Actual, Valid: true}, at, false, true
	if old.String != l.Actual || !old.Valid {
		j.moveScores(tg, ref.model, old, l.Actual)
	}
	switch {
	case !old.Valid:
		j.acc.addCell(ref.model, tg.bucket, tg.segment, l.Actual, tg.predicted, 1)
		j.acc.labeled(ref.model, 1)
		return store.LabelMatched
	case old.String != l.Actual:
		j.acc.addCell(ref.model, tg.bucket, tg.segment, old.String, tg.predicted, -1)
		j.acc.addCell(ref.model, tg.bucket, tg.segment, l.Actual, tg.predicted, 1)
		return store.LabelCorrected
	}
	// Same actual, newer version (or the real version confirming an
	// implied one): no cell moves.
	return store.LabelDuplicate
}

// moveScores counts a scored prediction's calibration and Brier entry
// moving from label old to actual. Stored scores are the store's own
// canonical JSON and decode; should one not, j.err keeps the error.
func (j *labelJoin) moveScores(tg *labelTarget, model int64, old sql.NullString, actual string) {
	if !tg.scores.Valid {
		return
	}
	scores, err := store.ParseScores([]byte(tg.scores.String))
	if err != nil {
		j.err = fmt.Errorf("decode stored scores: %w", err)
		return
	}
	terms, _ := store.NewScoreTerms(scores, tg.predicted)
	j.acc.moveLabel(model, tg.bucket, tg.segment, tg.predicted, terms, old.String, old.Valid, actual)
}

// setLabels writes the current labels the batch changed.
func (j *labelJoin) setLabels(ctx context.Context) error {
	var changed []predRef
	for r, tg := range j.preds {
		if tg.changed {
			changed = append(changed, r)
		}
	}
	for lo := 0; lo < len(changed); {
		size := chunkFor(len(changed) - lo)
		args := j.args[:0]
		for _, r := range changed[lo : lo+size] {
			tg := j.preds[r]
			args = append(args, r.model, r.id, tg.label.String, tg.labelAt)
		}
		j.args = args
		if _, err := j.tx.stmt(ctx, setLabelsSQL(size)).ExecContext(ctx, args...); err != nil {
			return unavailable("set current labels", err)
		}
		lo += size
	}
	return nil
}

// ApplyLabelTimeout gives due unlabeled predictions their implied version;
// see store.Store. It finds the buckets that still hold unlabeled
// predictions from the maintained counts, then runs set-based statements
// over those buckets' rows alone (see sqlIncompleteBuckets).
func (s *Store) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	tx, err := s.beginIngest(ctx, "begin label timeout")
	if err != nil {
		return 0, store.Changes{}, err
	}
	defer tx.Rollback()
	acc := newAccumulator()
	id, err := acc.model(ctx, s, tx, model)
	if err != nil {
		return 0, store.Changes{}, err
	}
	cutoff, shift := micros(now)-timeout.Microseconds(), timeout.Microseconds()
	var buckets string
	if err := tx.QueryRowContext(ctx, sqlIncompleteBuckets, id, cutoff).Scan(&buckets); err != nil {
		return 0, store.Changes{}, unavailable("find incomplete buckets", err)
	}
	if buckets == "[]" {
		return 0, store.Changes{}, nil
	}
	args := []any{id, cutoff, shift, label, micros(now), buckets}

	rows, err := tx.QueryContext(ctx, sqlDueGroups, args...)
	if err != nil {
		return 0, store.Changes{}, unavailable("find due predictions", err)
	}
	for rows.Next() {
		var (
			bucket, n          int64
			segment, predicted string
		)
		if err := rows.Scan(&bucket, &segment, &predicted, &n); err != nil {
			rows.Close()
			return 0, store.Changes{}, unavailable("find due predictions", err)
		}
		acc.addCell(id, bucket, segment, label, predicted, n)
	}
	if err := errors.Join(rows.Err(), rows.Close()); err != nil {
		return 0, store.Changes{}, unavailable("find due predictions", err)
	}
	if len(acc.cells) == 0 {
		return 0, store.Changes{}, nil
	}
	if err := dueScores(ctx, tx, acc, id, label, args); err != nil {
		return 0, store.Changes{}, err
	}
	if _, err := tx.ExecContext(ctx, sqlInsertImplied, args...); err != nil {
		return 0, store.Changes{}, unavailable("insert implied labels", err)
	}
	n, err := affected(tx.ExecContext(ctx, sqlSetImplied, args...))
	if err != nil {
		return 0, store.Changes{}, unavailable("set implied labels", err)
	}
	acc.labeled(id, n)
	if err := acc.flush(ctx, tx); err != nil {
		return 0, store.Changes{}, err
	}
	if err := tx.Commit(); err != nil {
		return 0, store.Changes{}, unavailable("commit label timeout", err)
	}
	return n, acc.changes(), nil
}

// ExpireEarlyLabels drops early labels received at or before now−ttl; see
// store.Store.
func (s *Store) ExpireEarlyLabels(ctx context.Context, model string, ttl time.Duration, now time.Time) (int64, error) {
	id, err := s.modelID(ctx, s.read, model)
	if err != nil {
		return 0, err
	}
	n, err := affected(s.write.ExecContext(ctx, sqlExpireEarly, id, micros(now)-ttl.Microseconds()))
	if err != nil {
		return 0, unavailable("expire early labels", err)
	}
	return n, nil
}

// dueScores counts the calibration and Brier entries of the due scored
// predictions of model id taking the implied label; args are the
// label-timeout statements' arguments.
func dueScores(ctx context.Context, tx *ingestTx, acc *accumulator, id int64, label string, args []any) error {
	err := each(ctx, tx, sqlDueScored, args, func(r *sql.Rows) error {
		var (
			bucket             int64
			segment, predicted string
			raw                string
		)
		if err := r.Scan(&bucket, &segment, &predicted, &raw); err != nil {
			return err
		}
		scores, err := store.ParseScores([]byte(raw))
		if err != nil {
			return fmt.Errorf("decode stored scores: %w", err)
		}
		terms, _ := store.NewScoreTerms(scores, predicted)
		acc.moveLabel(id, bucket, segment, predicted, terms, "", false, label)
		return nil
	})
	if err != nil {
		return unavailable("read due scores", err)
	}
	return nil
}
