// Package pgstore implements store.Store on PostgreSQL through pgx v5 and
// pgxpool: classwatch's production store, shared by every daemon of a
// deployment. A Store is safe for concurrent use by multiple goroutines, and
// several processes may use one database at once.
//
// # Layout
//
// The schema (migrations/postgres) is built around the two hot paths,
// prediction ingest and the label join, and keeps both append-only:
//
//	predictions       (model_id, id) primary key; the whole prediction and
//	                  a compact bigint pkey; BRIN index on bucket
//	label_versions    every label version, keyed to its prediction by
//	                  (model_id, pkey); partitioned by the prediction's
//	                  bucket into UTC days
//	early_labels      versions whose prediction has not arrived
//	cells             maintained counts per (model, bucket, segment, actual,
//	predicted_counts  predicted) and per (model, bucket, segment, predicted)
//	score_counts      score histograms per (model, bucket, segment, class,
//	                  bin); bin 0 is derived from predicted_counts.scored
//	score_labels      calibration and Brier sums per (model, bucket,
//	                  segment, bin), moved with the current label
//
// A prediction batch is one COPY into predictions, whose primary key both
// stores the lines and proves them new; only when it refuses a line does
// the batch fall back, from a savepoint, to reading the stored content of
// its keys and copying the new lines. Predicted-class counts are summed in
// memory and upserted once per count row.
//
// A label is never written into its prediction's row: updating wide rows
// in place dirties a random page per label and writes a full page image of
// it after every checkpoint, which makes the join slower as the table
// grows. Instead a label batch reads, per line, the prediction's key (pkey,
// bucket, segment, predicted) through the primary key and the prediction's
// versions through label_versions' (model_id, pkey) index in the one day
// partition concerned, decides every line in memory, and appends the new
// versions with one COPY. The current label is not stored: it is the first
// of a prediction's versions in (real first, greatest at, greatest actual)
// order, recomputed whenever the prediction is touched. Predictions keys
// are handed out in blocks (one sequence call per batch) in arrival order,
// and labels arrive roughly in prediction order, so the index pages a
// label batch touches are few and hot whatever the size of the tables.
//
// Each ingest call is one transaction; its BEGIN and COMMIT travel with its
// first and last statements, so a prediction batch costs four round trips
// and a label batch five or six.
//
// # Concurrency
//
// Label batches of one model run side by side. Each new label version is
// numbered after the versions of its prediction that the batch read, and
// label_versions' unique key (model_id, pkey, seq) admits one version per
// number: when two batches add a version to the same prediction at once,
// the second insert waits for the first batch, fails with a unique
// violation once it commits, and the second batch is retried from the
// start, now reading the first one's version; the retry takes the model's
// label lock exclusively, so a batch that lost a race once cannot lose
// again, however hot the predictions it labels. No row is locked or updated
// per label. Batches copy their versions and upsert their count rows in
// key order, so two batches that touch the same rows queue instead of
// deadlocking.
//
// Label batches take the model's label advisory lock (transaction-scoped)
// in shared mode; ApplyLabelTimeout and PurgeRaw take it exclusively, so
// they never run beside a label batch of their model. Prediction batches
// do not take it; they take the model's early-label lock in shared mode. A
// label batch that finds an unknown id takes that lock exclusively before
// it looks again and holds the label as early: either the prediction batch
// committed first and the label joins it, or the prediction batch waits
// and then finds the early label. Transactions that fail on a deadlock, a
// serialization failure or a lost insert race are retried a few times.
// Advisory lock keys include the search path, so stores in different
// schemas of one database do not block each other.
//
// # Retention
//
// PurgeRaw deletes the model's predictions before the cutoff (a block range
// scan through the BRIN index) and drops the day partitions of
// label_versions that every model has purged past. raw_partitions lists the
// models with rows in each day. In a day the cutoff splits, or one that
// another model still keeps (models with different retention sharing a
// day), the purged model's rows are deleted instead. A daemon that purges at
// midnight UTC therefore never deletes label history row by row.
//
// predictions itself is not partitioned by time: a prediction id must stay
// unique across all of a model's history, and PostgreSQL enforces
// uniqueness only within one partition, so a time-partitioned table would
// need a second, global key table written on every ingest. Purged
// predictions are row deletes, found through the BRIN index; autovacuum
// reclaims the space for new rows.
//
// # Limits
//
// label_versions gets a day partition only when a version is written into
// that day (a label joined, an early label joining its prediction, an
// implied label): predictions alone create none, however far back their
// times reach. One batch may need at most 366 new day partitions
// (maxBatchDays: a label backfill over a year of predictions), created 32
// per short transaction (maxNewDays). A batch that would need more is
// refused with store.ErrLimit before any is created and keeps nothing; the
// same batch fails the same way again, so the collector rejects its lines
// (reason store_limit) instead of answering 503.
// ApplyLabelTimeout labels the predictions of at most 32 days per call,
// oldest first, and leaves the rest to the next calls. PurgeRaw drops day
// partitions eight per transaction: dropping one locks label_versions
// against every ingest, so the drops go in short transactions with ingest
// between them. Predictions older than a model's retention are the usual
// cause of far-past days.
//
// # Distributed deployment
//
// Past one PostgreSQL the schema is meant for a distributed
// PostgreSQL-compatible engine that shards tables by a distribution column
// (Citus is one). model_id is that column: every table holding a model's
// data leads its primary key, and every index, with model_id, and every
// statement of the ingest and read paths filters or joins on it, so each
// statement runs on the shard of its model. Such a deployment needs:
//
//   - predictions, label_versions, early_labels, raw_partitions, cells and
//     predicted_counts distributed by model_id and co-located;
//     label_versions stays range-partitioned by day within each shard;
//   - models, model_classes, alerts, alert_history and schema_version as
//     reference (replicated) tables: they are small and not per model;
//   - the prediction_key_blocks sequence on the coordinator, or pkeys made
//     unique per shard (pkeys only need to be unique within a model);
//   - the advisory locks (migration, label, early-label, lead) taken on the
//     coordinator, where all sessions meet;
//   - batches that mix models split per model, so that each transaction
//     stays on one shard and commits without a two-phase commit.
//
// # Options
//
// Options.Schema puts the tables in a schema of their own (tests use one
// per test). Open sets each connection's time zone to UTC and
// plan_cache_mode to force_custom_plan, so a bucket range prunes the day
// partitions when a statement is planned, and the statement locks only the
// days it reads.
package pgstore
