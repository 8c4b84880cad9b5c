// Package collector is classwatch's ingest side: it decodes and validates
// predictions and labels line by line, resolves models and classes, writes
// each batch through the store in one transaction, keeps the ingest metrics,
// and runs the join's maintenance jobs (default labels after label_timeout,
// early-label expiry, raw-row retention).
//
// Every source feeds the same path (decode → validate → one store
// transaction → rolling windows): Submit takes one body, as the HTTP
// handlers (Register) and stream consumers have it; Ingest takes a file of
// any size in transactions of BatchOptions.BatchLines lines, for backfills.
// So a line is judged the same way whichever way it came in, and the body
// is never re-encoded. classwatch_source_lines_total counts line outcomes by
// source.
//
// # HTTP contract
//
// POST /v1/predictions and POST /v1/labels take a body of
// application/x-ndjson (also accepted as application/ndjson), read line by
// line and never whole, or application/json holding one object or an array
// of objects. A gzip Content-Encoding is accepted; the size limits apply to
// the decoded bytes as well. The body of every answer has the shape
//
//	{"accepted":N,"duplicates":N,"rejected":[{"line":L,"error":"..."}],"rejected_omitted":N}
//
// plus an "error" string when the request as a whole was refused. Line
// numbers are 1-based physical lines of an NDJSON body; blank lines are
// skipped and not counted. At most the first MaxListedRejections rejected
// lines are listed and the rest counted in rejected_omitted, so accepted +
// duplicates + len(rejected) + rejected_omitted equals the number of
// non-blank lines. For a JSON array, line is the element's
// index + 1; a single JSON object is line 1. A bad line never sinks the
// good lines of its batch; a body that is not valid JSON as a whole (a JSON
// array with a syntax error) cannot be split into lines and is refused.
//
// Status codes:
//
//   - 200: at least one line was accepted or a duplicate; rejected lines
//     are listed.
//   - 400: the body holds no line, cannot be parsed, or every line was
//     rejected.
//   - 401: tokens are configured and the request has no valid
//     "Authorization: Bearer" token.
//   - 403: every line was rejected because the token may not write its
//     model. A token that may not write some lines' model only gets those
//     lines rejected.
//   - 408 (connection closed): the body arrived slower than
//     Limits.MinBodyRate bytes/s once Limits.BodyGrace had passed.
//   - 413: the body passes Limits.MaxBodyBytes or one line passes
//     Limits.MaxLineBytes; nothing is kept.
//   - 415: a content type or encoding other than the above.
//   - 503 with Retry-After: the store could not commit (nothing of the
//     batch is kept), or Limits.MaxInFlight batches were already running
//     and no slot freed within Limits.QueueWait, or the bodies held in
//     memory reached Limits.MaxBufferedBytes, or the server is shutting down
//     (CutBodies). Overload is answered with 503, not 429, because it is the
//     server's state, not the client's rate.
//
// A body is read whole (gzip decoded) before its batch waits for an
// in-flight slot, so a slow sender holds only its own connection and bytes.
// At most the first MaxListedRejections rejected lines are listed, each
// error cut to a few hundred bytes, so the memory of a request follows the
// body limit, not the number of bad lines.
//
// A batch is answered 2xx only after its transaction committed. Class
// registration (auto_register) happens before the batch's transaction and
// stays even if the batch then fails. The collector writes through the small
// Store interface it declares; the daemon passes a windows.TrackedStore,
// which applies each committed transaction that changes counts (a batch, the
// default labels of Maintain) to the rolling windows before the call
// returns, so they count every commit exactly once even while they refresh
// from the store. Data flows one way: collector → store and windows.
//
// # Validation
//
// Unknown fields are rejected, so a typo ("predicition") is caught rather
// than silently dropped; field names are case-sensitive, and a field given
// twice in one object (or a class twice in scores) is rejected. A line must
// be valid UTF-8 and hold no lone UTF-16 surrogate escape (such a string
// would otherwise decode to U+FFFD, so two ids could become one); model,
// id, segment and class names must hold no control character (C0, DEL or
// C1, NUL included). These rules are the collector's, so a line gets the
// same outcome whichever store is behind it. model, id and predicted (labels: actual) are
// required strings; id is at most 256 bytes and segment at most 128. at is
// an RFC 3339 time in the years 1970 to 2199, by default the receive time
// (class and model names are case-sensitive). A time more than
// Limits.MaxFuture ahead of the receive time is rejected, because one such
// line would move the model's watermark and empty every window. A
// prediction in a bucket that the model's retention purges (older than
// Retention before the receive time, to the bucket) is rejected with the
// limit named: it would be dropped at once, and every distinct old day costs
// the store a partition. scores is
// an optional object of class → number in [0, 1] (JSON has no NaN or
// infinity, so the numbers are finite) whose sum is at most 1 + 0.02 (README
// "Early warning"); it may cover only some classes. Its keys must be
// classes of the model and count as classes for auto_register. An unknown model is
// rejected unless AutoRegisterModels, up to MaxModels models; an unknown
// class is rejected unless the model's policy auto-registers classes, up
// to MaxClasses. Model names are 1 to 128 bytes of letters, digits, '.',
// '_', ':' and '-' (they appear in URL paths); class names 1 to 128 bytes.
//
// # Metrics
//
// classwatch_predictions_received_total{model} counts prediction lines of
// committed batches that were stored or were duplicates (conflicts are
// rejections). classwatch_labels_received_total{model,result} counts label
// lines by outcome, plus implied (default labels applied) and expired
// (early labels dropped) from the maintenance jobs, and rejected. A rejected
// line whose model is not registered is counted with model="" so that
// invalid input cannot create unbounded label values.
// classwatch_source_lines_total{source,kind,result} counts the lines of
// committed bodies by source (http, file, nats), kind and result (accepted,
// duplicate, rejected). The other metrics are
// named classwatch_collector_* and classwatch_last_prediction_timestamp_seconds.
//
// A Collector is safe for concurrent use by multiple goroutines.
package collector
