// Package natsjs ingests predictions and labels from a NATS JetStream
// stream, so that many producers can publish and many classwatch replicas
// consume one durable stream.
//
// # Messages
//
// A message body is what one HTTP ingest request body may be (see the
// collector package's HTTP contract): one JSON object, a JSON array of
// objects, or NDJSON lines. Messages on the predictions subject carry
// predictions, those on the labels subject labels. Each message goes
// through collector.Collector.Submit — the same decode, validation, single
// store transaction and rolling-window hook as a POST — so a line gets the
// same outcome, and is counted in the same per-model counters, whichever
// way it came; its per-source counter has source="<source name>" (default
// "nats"). Line numbers in errors are relative to the message.
//
// # Delivery
//
// The stream (config key stream) is created when missing, capturing the
// two subjects, with work-queue retention (a message is removed once
// acknowledged, kept however old until then) and file storage. An existing
// stream is used as it is, but must capture both subjects and neither
// .rejected subject. Every replica binds the same durable pull consumer
// (key durable; explicit acks, unlimited deliveries), so JetStream hands
// each message to one replica at a time. A replica pulls continuously,
// with at most fetch_messages messages and fetch_bytes bytes requested
// ahead of its workers, and submits up to workers messages at once:
//
//   - committed (even if some lines were rejected): the rejected lines are
//     published, then the message is acknowledged, and the ack is confirmed
//     by the server;
//   - the store could not commit: nothing of the message was kept; it is
//     handed back (nak) with nak_delay and redelivered;
//   - the collector is at max_in_flight (backpressure): nak with nak_delay;
//   - a message that can never be ingested — larger than
//     ingest.max_body_bytes, a line over ingest.max_line_bytes, a JSON body
//     that does not parse, a subject that is neither input subject — is
//     refused: counted, published to .rejected with line 0 and its error,
//     and acknowledged, so it never loops;
//   - any other error: nak with nak_delay.
//
// A replica killed mid-batch never acknowledged the messages it held, so
// JetStream redelivers them after the consumer's ack_wait; the store's
// idempotence (README.md "Join semantics and windows": a repeated
// prediction or label is a duplicate) makes a message committed but not
// acknowledged count once. Stop (SIGTERM) stops fetching, lets the messages
// in hand commit and be acknowledged, then closes the connection.
//
// # Rejected lines
//
// Rejected lines of a message on subject S are published to S.rejected
// (for example classwatch.predictions.rejected) as plain NATS messages of
// NDJSON records {"line":L,"error":"...","original":"<the line's text>"}
// with headers Classwatch-Source and Classwatch-Stream-Sequence (the
// original message's sequence). They are kept out of the input stream on
// purpose: there they would come round again as input, and a consumer
// filtering two subjects out of a wider stream needs NATS 2.10. An
// operator who wants to keep them creates a stream over the .rejected
// subjects; JetStream stores plain publishes on a stream's subjects.
// Publishing them is best effort: the lines' outcome is committed and
// counted before.
//
// # Readiness and metrics
//
// Ready reports a source that is not connected or could not set up its
// stream and consumer; the daemon's /readyz includes it. The metrics
// (classwatch_jetstream_*, label source) count messages consumed,
// redelivered, acknowledged, handed back (by reason) and refused (by
// reason), rejection records published, and export the consumer's lag:
// classwatch_jetstream_consumer_pending_messages (not yet delivered) and
// classwatch_jetstream_consumer_ack_pending_messages (delivered, not yet
// acknowledged). Every replica reports the same shared consumer, so take
// max() across replicas, not sum().
package natsjs
