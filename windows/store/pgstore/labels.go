package pgstore

import (
	"cmp"
	"context"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// versionRows collects new label versions, copied into label_versions in
// one COPY. Each is numbered after the versions of its prediction that the
// batch read (seq): should a concurrent batch have added a version to the
// same prediction meanwhile, the unique key (model_id, pkey, seq) refuses
// the copy and the batch is retried. Early labels joining a new prediction
// are its first versions.
type versionRows struct {
	models  []int32
	buckets []time.Time
	pkeys   []int64
	seqs    []int32
	implied []bool
	ats     []time.Time
	actuals []string
}

func (v *versionRows) add(model int32, bucket time.Time, pkey int64, seq int32, implied bool, at time.Time, actual string) {
	v.models = append(v.models, model)
	v.seqs = append(v.seqs, seq)
	v.buckets = append(v.buckets, bucket)
	v.pkeys = append(v.pkeys, pkey)
	v.implied = append(v.implied, implied)
	v.ats = append(v.ats, at)
	v.actuals = append(v.actuals, actual)
}

// days returns the (model, day) of each version.
func (v *versionRows) days() []modelDay {
	out := make([]modelDay, len(v.models))
	for i := range out {
		out[i] = modelDay{v.models[i], dayOf(v.buckets[i]).UnixMicro()}
	}
	return out
}

// copy writes the versions, in key order so that neighbouring index
// inserts share pages.
func (v *versionRows) copy(ctx context.Context, tx conn) error {
	if len(v.models) == 0 {
		return nil
	}
	order := make([]int, len(v.models))
	for i := range order {
		order[i] = i
	}
	slices.SortFunc(order, func(x, y int) int {
		return cmp.Or(cmp.Compare(v.models[x], v.models[y]), cmp.Compare(v.pkeys[x], v.pkeys[y]), cmp.Compare(v.seqs[x], v.seqs[y]))
	})
	row := make([]any, 7)
	src := pgx.CopyFromSlice(len(order), func(i int) ([]any, error) {
		i = order[i]
		row[0], row[1], row[2], row[3], row[4], row[5], row[6] = v.models[i], v.buckets[i], v.pkeys[i], v.seqs[i], v.implied[i], v.ats[i], v.actuals[i]
		return row, nil
	})
	_, err := tx.CopyFrom(ctx, pgx.Identifier{"label_versions"}, []string{"model_id", "bucket", "pkey", "seq", "implied", "at", "actual"}, src)
	return err
}

// version is one label version of a prediction.
type version struct {
	actual  string
	at      time.Time
	implied bool
}

// current returns the label of a prediction with versions vs: its real
// version with the greatest (at, actual), else its implied version.
func current(vs []version) (version, bool) {
	var best, implied version
	var haveBest, haveImplied bool
	for _, v := range vs {
		switch {
		case v.implied:
			implied, haveImplied = v, true
		case !haveBest || later(v.at, v.actual, best.at, best.actual):
			best, haveBest = v, true
		}
	}
	if haveBest {
		return best, true
	}
	return implied, haveImplied
}

// labelKey is a (model, id) pair.
type labelKey struct {
	model int32
	id    string
}

// target is a known prediction a label batch touches, with its versions.
type target struct {
	model              int32
	pkey               int64
	bucket             time.Time
	segment, predicted string
	versions           []version
	seq                int32   // the greatest seq of its versions (0: none)
	scores             []byte  // the stored scores' JSON, nil if none
	before             version // current label before the batch
	had                bool
}

// IngestLabels applies a batch of label versions in one transaction; see
// store.Store.
//
// Labels live apart from predictions: a label line costs an index lookup of
// its prediction in predictions, a lookup of the prediction's versions in
// its day of label_versions and the copy of the new version there. Nothing
// is updated in place. The outcome of each line is decided in memory, in
// line order, and the writes go as one COPY and one round trip of
// set-based statements. Label batches of one model run side by side: the
// numbered versions (see versionRows) make a batch that raced another on
// the same prediction fail and retry, so the versions a batch builds on
// are the ones it read.
func (s *Store) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	res := store.LabelResult{Outcomes: make([]store.LabelOutcome, len(batch))}
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
	// Each distinct (model, id), sorted so that the lookups walk the
	// primary key in order, and the key of each line.
	index := make(map[labelKey]int, len(batch))
	keys := make([]labelKey, 0, len(batch))
	for _, l := range batch {
		k := labelKey{ids[l.Model], l.ID}
		if _, ok := index[k]; !ok {
			index[k] = 0
			keys = append(keys, k)
		}
	}
	slices.SortFunc(keys, func(a, b labelKey) int { return cmp.Or(cmp.Compare(a.model, b.model), strings.Compare(a.id, b.id)) })
	for j, k := range keys {
		index[k] = j
	}
	lineKey := make([]int, len(batch))
	for i, l := range batch {
		lineKey[i] = index[labelKey{ids[l.Model], l.ID}]
	}
	var t *tally
	// A retry takes the models' label locks exclusively: it then waits for
	// the batches in flight and keeps new ones out, so a batch that lost a
	// race on a version number cannot lose it again however busy the model.
	attempts := 0
	err = s.retry(ctx, func() error {
		exclusive := attempts > 0
		attempts++
		return s.withDays(ctx, func() error {
			t = newTally()
			return s.inTx(ctx, func(c *pgx.Conn) error {
				return s.applyLabels(ctx, c, batch, ids, keys, lineKey, micro(now), exclusive, res.Outcomes, t)
			})
		})
	})
	if err != nil {
		return res, unavailable("ingest labels", err)
	}
	res.Changes = t.changes(namesOf(ids))
	return res, nil
}

// applyLabels is one attempt at the label transaction: keys are the
// batch's distinct (model, id) pairs and lineKey the key of each line.
func (s *Store) applyLabels(ctx context.Context, tx *pgx.Conn, batch []store.Label, ids map[string]int32,
	keys []labelKey, lineKey []int, now time.Time, exclusive bool, out []store.LabelOutcome, t *tally) error {
	targets, err := s.findTargets(ctx, tx, ids, keys, exclusive)
	if err != nil {
		return err
	}
	var days []modelDay
	for _, tg := range targets {
		if tg != nil {
			days = append(days, modelDay{tg.model, dayOf(tg.bucket).UnixMicro()})
		}
	}
	if err := s.needDays(days); err != nil {
		return err
	}
	if err := readVersions(ctx, tx, targets); err != nil {
		return err
	}
	var v versionRows
	early := decideLabels(batch, keys, lineKey, targets, &v, out)
	for _, tg := range targets {
		if tg == nil {
			continue
		}
		if err := tallyTarget(tg, t); err != nil {
			return err
		}
	}
	if err := v.copy(ctx, tx); err != nil {
		return err
	}
	var b pgx.Batch
	early.queue(&b, now, out)
	t.queue(&b)
	b.Queue(sqlCommit)
	return tx.SendBatch(ctx, &b).Close()
}

// findTargets opens the transaction, takes the models' label locks (shared,
// or exclusive when exclusive is set) and
// looks up the predictions of keys, in one round trip; for unknown keys it
// then takes the models' early-label locks exclusively, which waits for
// prediction batches in flight, and looks again. The result holds nil for
// a key still unknown.
func (s *Store) findTargets(ctx context.Context, tx *pgx.Conn, ids map[string]int32, keys []labelKey, exclusive bool) ([]*target, error) {
	targets := make([]*target, len(keys))
	all := make([]int, len(keys))
	for i := range all {
		all[i] = i
	}
	var b pgx.Batch
	b.Queue(sqlBegin)
	b.Queue(sqlNoHashJoin)
	b.Queue(sqlNoMergeJoin)
	b.Queue(sqlNoJIT)
	lock := sqlLockModelsShare
	if exclusive {
		lock = sqlLockModels
	}
	b.Queue(lock, s.keys.label, sortedModels(ids))
	queueFind(&b, keys, all, targets)
	if err := tx.SendBatch(ctx, &b).Close(); err != nil {
		return nil, err
	}
	var (
		unknown       []int
		unknownModels []int32
	)
	for i, tg := range targets {
		if tg == nil {
			unknown = append(unknown, i)
			unknownModels = append(unknownModels, keys[i].model)
		}
	}
	if len(unknown) > 0 {
		var b pgx.Batch
		b.Queue(sqlLockModels, s.keys.early, distinctSorted(unknownModels))
		queueFind(&b, keys, unknown, targets)
		if err := tx.SendBatch(ctx, &b).Close(); err != nil {
			return nil, err
		}
	}
	return targets, nil
}

// earlyRows collects a batch's early label versions, one row per distinct
// version.
type earlyRows struct {
	models       []int32
	ids, actuals []string
	ats          []time.Time
	lines        [][]int // batch lines per row
	row          map[earlyKey]int
}

// add records line i as early version ek.
func (e *earlyRows) add(ek earlyKey, i int) {
	if j, ok := e.row[ek]; ok {
		e.lines[j] = append(e.lines[j], i)
		return
	}
	if e.row == nil {
		e.row = map[earlyKey]int{}
	}
	e.row[ek] = len(e.models)
	e.models = append(e.models, ek.model)
	e.ids = append(e.ids, ek.id)
	e.ats = append(e.ats, ek.at)
	e.actuals = append(e.actuals, ek.actual)
	e.lines = append(e.lines, []int{i})
}

// queue queues the insert of the early rows. An early version already held
// is a duplicate; RETURNING names the new ones, whose first line is early.
func (e *earlyRows) queue(b *pgx.Batch, now time.Time, out []store.LabelOutcome) {
	if len(e.models) == 0 {
		return
	}
	for _, lines := range e.lines {
		for _, i := range lines {
			out[i] = store.LabelDuplicate
		}
	}
	b.Queue(sqlAddEarly, e.models, e.ids, e.ats, e.actuals, now).Query(func(rows pgx.Rows) error {
		var ek earlyKey
		_, err := pgx.ForEachRow(rows, []any{&ek.model, &ek.id, &ek.at, &ek.actual}, func() error {
			out[e.lines[e.row[ek]][0]] = store.LabelEarly
			return nil
		})
		return err
	})
}

// decideLabels decides each line in order against the versions known so
// far, adds the new versions to v and returns the early ones.
func decideLabels(batch []store.Label, keys []labelKey, lineKey []int, targets []*target, v *versionRows, out []store.LabelOutcome) *earlyRows {
	early := &earlyRows{}
	for i, l := range batch {
		k := keys[lineKey[i]]
		at := micro(l.At)
		tg := targets[lineKey[i]]
		if tg == nil {
			early.add(earlyKey{k, at, l.Actual}, i)
			continue
		}
		nv := version{actual: l.Actual, at: at}
		if slices.ContainsFunc(tg.versions, func(x version) bool { return !x.implied && x.actual == nv.actual && x.at.Equal(nv.at) }) {
			out[i] = store.LabelDuplicate
			continue
		}
		before, had := current(tg.versions)
		tg.versions = append(tg.versions, nv)
		tg.seq++
		v.add(k.model, tg.bucket, tg.pkey, tg.seq, false, at, l.Actual)
		after, _ := current(tg.versions)
		switch {
		case !had:
			out[i] = store.LabelMatched
		case before.actual != after.actual:
			out[i] = store.LabelCorrected
		default:
			out[i] = store.LabelDuplicate
		}
	}
	return early
}

// tallyTarget counts the move of a prediction's cell, and of its
// calibration and Brier entry when it has scores, from its current label
// before the batch to its current label after it.
func tallyTarget(tg *target, t *tally) error {
	after, has := current(tg.versions)
	if !has || (tg.had && after.actual == tg.before.actual) {
		return nil
	}
	if tg.had {
		t.addCell(tg.model, tg.bucket, tg.segment, tg.before.actual, tg.predicted, -1)
	}
	t.addCell(tg.model, tg.bucket, tg.segment, after.actual, tg.predicted, 1)
	if tg.scores == nil {
		return nil
	}
	terms, err := scoreTerms(tg.scores, tg.predicted)
	if err != nil {
		return err
	}
	t.moveLabel(tg.model, tg.bucket, tg.segment, tg.predicted, terms, tg.before.actual, tg.had, after.actual)
	return nil
}

// scoreTerms decodes stored scores and returns their terms.
func scoreTerms(raw []byte, predicted string) (store.ScoreTerms, error) {
	scores, err := store.ParseScores(raw)
	if err != nil {
		return store.ScoreTerms{}, fmt.Errorf("decode stored scores: %w", err)
	}
	terms, _ := store.NewScoreTerms(scores, predicted)
	return terms, nil
}

// earlyKey is one early label version.
type earlyKey struct {
	labelKey
	at     time.Time
	actual string
}

// queueFind queues the lookup of the predictions of keys[which]; the known
// ones are stored in targets at their key's index.
func queueFind(b *pgx.Batch, keys []labelKey, which []int, targets []*target) {
	models := make([]int32, len(which))
	idList := make([]string, len(which))
	for i, j := range which {
		models[i], idList[i] = keys[j].model, keys[j].id
	}
	b.Queue(sqlFindPredictions, models, idList).Query(func(rows pgx.Rows) error {
		var (
			i  int64
			tg target
		)
		_, err := pgx.ForEachRow(rows, []any{&i, &tg.pkey, &tg.bucket, &tg.segment, &tg.predicted, &tg.scores}, func() error {
			j := which[i-1]
			found := tg
			found.model = keys[j].model
			targets[j] = &found
			return nil
		})
		return err
	})
}

// readVersions loads the label versions of the known targets and their
// current label. It reads each day apart: bounded to one day, a lookup is
// planned against that day's partition alone, with no per-row partition
// pruning, and all days go in one round trip.
func readVersions(ctx context.Context, tx conn, targets []*target) error {
	type dayLookup struct {
		models  []int32
		buckets []time.Time
		pkeys   []int64
		tgs     []*target
	}
	days := map[int64]*dayLookup{}
	for _, tg := range targets {
		if tg == nil {
			continue
		}
		k := dayOf(tg.bucket).UnixMicro()
		d := days[k]
		if d == nil {
			d = &dayLookup{}
			days[k] = d
		}
		d.models = append(d.models, tg.model)
		d.buckets = append(d.buckets, tg.bucket)
		d.pkeys = append(d.pkeys, tg.pkey)
		d.tgs = append(d.tgs, tg)
	}
	if len(days) == 0 {
		return nil
	}
	var b pgx.Batch
	for k, d := range days {
		// Probe in key order, so neighbouring probes share index pages.
		slices.SortFunc(d.tgs, func(x, y *target) int { return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.pkey, y.pkey)) })
		for i, tg := range d.tgs {
			d.models[i], d.buckets[i], d.pkeys[i] = tg.model, tg.bucket, tg.pkey
		}
		start := time.UnixMicro(k).UTC()
		b.Queue(sqlFindVersions, d.models, d.buckets, d.pkeys, start, start.Add(day)).Query(func(rows pgx.Rows) error {
			var (
				i   int64
				seq int32
				v   version
			)
			_, err := pgx.ForEachRow(rows, []any{&i, &seq, &v.implied, &v.at, &v.actual}, func() error {
				tg := d.tgs[i-1]
				tg.versions = append(tg.versions, v)
				tg.seq = max(tg.seq, seq)
				return nil
			})
			return err
		})
	}
	if err := tx.SendBatch(ctx, &b).Close(); err != nil {
		return err
	}
	for _, tg := range targets {
		if tg != nil {
			tg.before, tg.had = current(tg.versions)
		}
	}
	return nil
}

// ApplyLabelTimeout gives due unlabeled predictions their implied version;
// see store.Store. It finds the buckets that still hold unlabeled
// predictions from the maintained counts (predicted count above labeled
// count), so each run reads only those buckets' rows.
func (s *Store) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	id, err := s.modelID(ctx, model)
	if err != nil {
		return 0, store.Changes{}, err
	}
	due := micro(now.Add(-timeout))
	if err := s.summarize(ctx); err != nil {
		return 0, store.Changes{}, err
	}
	var (
		n int64
		t *tally
	)
	err = s.retry(ctx, func() error {
		return s.withDays(ctx, func() error {
			n, t = 0, newTally()
			return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) (err error) {
				n, err = s.applyTimeout(ctx, tx, id, due, timeout, label, t)
				return err
			})
		})
	})
	if err != nil {
		return 0, store.Changes{}, unavailable("apply label timeout", err)
	}
	return n, t.changes(map[int32]string{id: model}), nil
}

// applyTimeout is one attempt at ApplyLabelTimeout's transaction. It
// labels the due buckets of the first maxNewDays days that hold any; the
// buckets of later days wait for the next call, so one call creates a
// bounded number of partitions however far back the unlabeled predictions
// reach.
func (s *Store) applyTimeout(ctx context.Context, tx pgx.Tx, id int32, due time.Time, timeout time.Duration, label string, t *tally) (int64, error) {
	if _, err := tx.Exec(ctx, sqlLockModels, s.keys.label, []int32{id}); err != nil {
		return 0, err
	}
	var purged *time.Time
	if err := tx.QueryRow(ctx, sqlPurgedBefore, id).Scan(&purged); err != nil {
		return 0, err
	}
	rows, err := tx.Query(ctx, sqlIncompleteBuckets, id, due, purged)
	if err != nil {
		return 0, err
	}
	buckets, err := pgx.CollectRows(rows, pgx.RowTo[time.Time])
	if err != nil || len(buckets) == 0 {
		return 0, err
	}
	buckets, days := boundDays(id, buckets)
	if err := s.needDays(days); err != nil {
		return 0, err
	}
	rows, err = tx.Query(ctx, sqlApplyTimeout, id, buckets, buckets[0], buckets[len(buckets)-1], due, timeout, label)
	if err != nil {
		return 0, err
	}
	var (
		n                  int64
		bucket             time.Time
		segment, predicted string
		count              int64
		scores             []byte
	)
	_, err = pgx.ForEachRow(rows, []any{&bucket, &segment, &predicted, &count, &scores}, func() error {
		t.addCell(id, bucket, segment, label, predicted, count)
		n += count
		if scores == nil {
			return nil
		}
		terms, err := scoreTerms(scores, predicted)
		if err != nil {
			return err
		}
		t.moveLabel(id, bucket, segment, predicted, terms, "", false, label)
		return nil
	})
	if err != nil {
		return 0, err
	}
	return n, t.write(ctx, tx)
}

// ExpireEarlyLabels drops early labels received at or before now−ttl; see
// store.Store.
func (s *Store) ExpireEarlyLabels(ctx context.Context, model string, ttl time.Duration, now time.Time) (int64, error) {
	id, err := s.modelID(ctx, model)
	if err != nil {
		return 0, err
	}
	tag, err := s.pool.Exec(ctx, sqlExpireEarly, id, micro(now.Add(-ttl)))
	if err != nil {
		return 0, unavailable("expire early labels", err)
	}
	return tag.RowsAffected(), nil
}
