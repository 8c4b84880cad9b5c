-- classwatch embedded schema, version 1.
--
-- Times are INTEGER microseconds since the Unix epoch (UTC), the resolution
-- PostgreSQL's timestamptz keeps, so both backends judge "same at" alike.
-- Tables keyed by a natural key are WITHOUT ROWID: the row lives in the key's
-- B-tree, which saves one B-tree write per inserted prediction or label.
-- schema_version is created by the store itself before any migration runs.

-- models is the registry; the counters and latest_at are maintained by every
-- ingest so that listing models never scans raw rows.
CREATE TABLE models (
    id            INTEGER PRIMARY KEY,
    name          TEXT    NOT NULL UNIQUE,
    -- latest_at is the greatest prediction event time ever stored (NULL: none).
    latest_at     INTEGER,
    -- predictions and labeled count the raw predictions still kept and those
    -- among them with a current label.
    predictions   INTEGER NOT NULL DEFAULT 0,
    labeled       INTEGER NOT NULL DEFAULT 0,
    -- purged_before is the greatest PurgeRaw cutoff: buckets before it keep
    -- their cells but lost their raw rows, so Verify skips them.
    purged_before INTEGER
);

-- model_classes holds each model's class list; position fixes matrix axes.
CREATE TABLE model_classes (
    model_id INTEGER NOT NULL REFERENCES models (id),
    position INTEGER NOT NULL,
    name     TEXT    NOT NULL,
    PRIMARY KEY (model_id, position),
    UNIQUE (model_id, name)
) WITHOUT ROWID;

-- predictions are the raw prediction rows. label, label_at and label_implied
-- copy the current label version (NULL: no version yet) so that a label line
-- is judged with one key lookup; Verify recomputes the current label from
-- label_versions and so checks this copy through the cells it maintains.
CREATE TABLE predictions (
    model_id      INTEGER NOT NULL REFERENCES models (id),
    id            TEXT    NOT NULL,
    at            INTEGER NOT NULL,
    bucket        INTEGER NOT NULL,
    segment       TEXT    NOT NULL,
    predicted     TEXT    NOT NULL,
    -- scores is the canonical JSON object of per-class scores, NULL if none.
    scores        TEXT,
    received_at   INTEGER NOT NULL,
    label         TEXT,
    label_at      INTEGER,
    label_implied INTEGER,
    PRIMARY KEY (model_id, id)
) WITHOUT ROWID;

-- Bucket ranges: CountsAsOf, Verify and PurgeRaw. at follows bucket so that
-- a bucket's entries sort by event time rather than by id: predictions come
-- roughly in time order, so each insert appends at the end of its bucket
-- instead of splitting a page in the middle, and CountsAsOf's at bound is
-- checked in the index.
CREATE INDEX predictions_bucket ON predictions (model_id, bucket, at);

-- Unlabeled predictions by event time: ApplyLabelTimeout finds the due ones
-- without walking every labeled row; a row leaves the index when labeled.
CREATE INDEX predictions_unlabeled ON predictions (model_id, at) WHERE label IS NULL;

-- label_versions keeps every distinct version of every joined label. The key
-- order (implied, at, actual) sorts a prediction's versions so the current
-- one is found in key order: real before implied, then greatest at, then
-- greatest actual.
CREATE TABLE label_versions (
    model_id    INTEGER NOT NULL,
    id          TEXT    NOT NULL,
    implied     INTEGER NOT NULL,
    at          INTEGER NOT NULL,
    actual      TEXT    NOT NULL,
    received_at INTEGER NOT NULL,
    PRIMARY KEY (model_id, id, implied, at, actual),
    FOREIGN KEY (model_id, id) REFERENCES predictions (model_id, id)
) WITHOUT ROWID;

-- early_labels hold label versions whose prediction has not arrived yet.
CREATE TABLE early_labels (
    model_id    INTEGER NOT NULL REFERENCES models (id),
    id          TEXT    NOT NULL,
    at          INTEGER NOT NULL,
    actual      TEXT    NOT NULL,
    received_at INTEGER NOT NULL,
    PRIMARY KEY (model_id, id, at, actual)
) WITHOUT ROWID;

-- Expiry by receive time.
CREATE INDEX early_labels_received ON early_labels (model_id, received_at);

-- cells are the maintained confusion counts per segment.
CREATE TABLE cells (
    model_id  INTEGER NOT NULL REFERENCES models (id),
    bucket    INTEGER NOT NULL,
    segment   TEXT    NOT NULL,
    actual    TEXT    NOT NULL,
    predicted TEXT    NOT NULL,
    n         INTEGER NOT NULL,
    PRIMARY KEY (model_id, bucket, segment, actual, predicted)
) WITHOUT ROWID;

-- predicted_counts count every stored prediction, labeled or not.
CREATE TABLE predicted_counts (
    model_id  INTEGER NOT NULL REFERENCES models (id),
    bucket    INTEGER NOT NULL,
    segment   TEXT    NOT NULL,
    predicted TEXT    NOT NULL,
    n         INTEGER NOT NULL,
    PRIMARY KEY (model_id, bucket, segment, predicted)
) WITHOUT ROWID;

-- alerts hold each alert's current state.
CREATE TABLE alerts (
    key        TEXT    PRIMARY KEY,
    rule       TEXT    NOT NULL,
    model      TEXT    NOT NULL,
    class      TEXT    NOT NULL,
    state      TEXT    NOT NULL,
    data       BLOB,
    updated_at INTEGER NOT NULL
) WITHOUT ROWID;

-- alert_history is append-only; seq orders records with equal updated_at.
CREATE TABLE alert_history (
    seq        INTEGER PRIMARY KEY,
    key        TEXT    NOT NULL,
    rule       TEXT    NOT NULL,
    model      TEXT    NOT NULL,
    class      TEXT    NOT NULL,
    state      TEXT    NOT NULL,
    data       BLOB,
    updated_at INTEGER NOT NULL
);

CREATE INDEX alert_history_updated ON alert_history (updated_at);
