package natsjs

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/classwatch/classwatch/collector"
)

// Headers of the messages published to the .rejected subjects.
const (
	// HeaderSource names the source (its metrics' source label).
	HeaderSource = "Classwatch-Source"
	// HeaderSequence is the stream sequence of the message the rejected
	// lines came from.
	HeaderSequence = "Classwatch-Stream-Sequence"
)

// maxOriginal caps the original text kept in one rejection record.
const maxOriginal = 4096

// ackTimeout bounds the wait for the server to confirm an ack.
const ackTimeout = 5 * time.Second

// Rejection is one record of a message published to a .rejected subject:
// the line of the original message (0 when the message was refused as a
// whole), why it was rejected, and its text.
type Rejection struct {
	Line  int    `json:"line"`
	Error string `json:"error"`
	// Original is the line's text, or the message's when Line is 0, cut to
	// its first 4096 bytes when longer (Truncated is then true).
	Original  string `json:"original"`
	Truncated bool   `json:"truncated,omitempty"`
}

// handle submits one message and acknowledges it after its commit, hands
// it back when the store or the collector could not take it, and
// acknowledges a message that can never be ingested after publishing why.
func (s *Source) handle(ctx context.Context, msg jetstream.Msg) {
	start := time.Now()
	name := s.cfg.Name
	defer func() { s.m.messageSeconds.WithLabelValues(name).Observe(time.Since(start).Seconds()) }()
	s.m.consumed.WithLabelValues(name).Inc()
	var seq uint64
	if meta, err := msg.Metadata(); err == nil {
		seq = meta.Sequence.Stream
		if meta.NumDelivered > 1 {
			s.m.redelivered.WithLabelValues(name).Inc()
		}
	}

	var k collector.Kind
	switch msg.Subject() {
	case s.cfg.PredictionsSubject:
		k = collector.Predictions
	case s.cfg.LabelsSubject:
		k = collector.Labels
	default:
		s.refuse(ctx, msg, seq, refuseSubject, fmt.Sprintf("subject %s is neither the predictions nor the labels subject", msg.Subject()))
		return
	}
	data := msg.Data()
	if int64(len(data)) > s.maxBody {
		s.refuse(ctx, msg, seq, refuseTooLarge, fmt.Sprintf("message is larger than the %d-byte limit", s.maxBody))
		return
	}

	res, format, err := s.submit(ctx, k, data, bodyFormat(msg.Headers()))
	var (
		storeErr *collector.StoreError
		tooLarge *collector.TooLargeError
		tooLong  *collector.LineTooLongError
		bodyErr  *collector.BodyError
	)
	switch {
	case err == nil:
		s.publishRejects(msg.Subject(), seq, rejections(data, format, res))
		s.ack(ctx, msg)
	case errors.Is(err, collector.ErrBusy):
		s.nak(msg, nakBusy, s.cfg.NakDelay)
	case ctx.Err() != nil:
		s.nak(msg, nakShutdown, 0)
	case errors.As(err, &storeErr):
		s.log.Warn("message not committed; it will be redelivered", "sequence", seq, "err", err)
		s.nak(msg, nakStore, s.cfg.NakDelay)
	case errors.As(err, &tooLarge) || errors.As(err, &tooLong):
		s.refuse(ctx, msg, seq, refuseTooLarge, err.Error())
	case errors.As(err, &bodyErr):
		s.refuse(ctx, msg, seq, refuseUnparseable, err.Error())
	default:
		// Not known to be permanent: hand it back rather than drop it.
		s.log.Warn("message not ingested; it will be redelivered", "sequence", seq, "err", err)
		s.nak(msg, nakError, s.cfg.NakDelay)
	}
}

// submit hands one body to the collector. A body of unknown format that
// starts like a JSON object but does not parse as one is taken as NDJSON
// whose first line is bad: its other lines are not sunk with it.
// It returns the format the lines were numbered in.
func (s *Source) submit(ctx context.Context, k collector.Kind, data []byte, f collector.Format) (collector.Result, collector.Format, error) {
	opts := collector.SubmitOptions{Format: f, Source: s.cfg.Name}
	res, err := s.sub.Submit(ctx, k, bytes.NewReader(data), opts)
	var bodyErr *collector.BodyError
	if f == collector.FormatAuto && errors.As(err, &bodyErr) {
		if rest := bytes.TrimLeft(data, " \t\r\n\xef\xbb\xbf"); len(rest) > 0 && rest[0] == '{' {
			opts.Format = collector.NDJSON
			res, err = s.sub.Submit(ctx, k, bytes.NewReader(data), opts)
			return res, collector.NDJSON, err
		}
	}
	return res, f, err
}

// bodyFormat reads a message's Content-Type header, as HTTP ingest does:
// application/x-ndjson (or application/ndjson) is NDJSON,
// application/json one object or an array; without it the collector
// detects the format.
func bodyFormat(h nats.Header) collector.Format {
	ct, _, _ := strings.Cut(h.Get("Content-Type"), ";")
	switch strings.ToLower(strings.TrimSpace(ct)) {
	case "application/x-ndjson", "application/ndjson":
		return collector.NDJSON
	case "application/json":
		return collector.JSON
	}
	return collector.FormatAuto
}

// refuse acknowledges a message that can never be ingested, after
// publishing why to the subject's .rejected subject.
func (s *Source) refuse(ctx context.Context, msg jetstream.Msg, seq uint64, reason, why string) {
	s.m.refused.WithLabelValues(s.cfg.Name, reason).Inc()
	s.log.Warn("message refused", "subject", msg.Subject(), "sequence", seq, "reason", reason, "err", why)
	s.publishRejects(msg.Subject(), seq, []Rejection{record(0, why, msg.Data())})
	s.ack(ctx, msg)
}

func (s *Source) ack(ctx context.Context, msg jetstream.Msg) {
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), ackTimeout)
	defer cancel()
	// A confirmed ack keeps redeliveries, and so duplicate counts, rare.
	if err := msg.DoubleAck(ctx); err != nil {
		s.m.ackErrors.WithLabelValues(s.cfg.Name).Inc()
		s.log.Warn("acknowledge message", "err", err)
		return
	}
	s.m.acked.WithLabelValues(s.cfg.Name).Inc()
}

func (s *Source) nak(msg jetstream.Msg, reason string, delay time.Duration) {
	s.m.naks.WithLabelValues(s.cfg.Name, reason).Inc()
	var err error
	if delay > 0 {
		err = msg.NakWithDelay(delay)
	} else {
		err = msg.Nak()
	}
	if err != nil {
		// The message comes back after the consumer's ack wait anyway.
		s.log.Debug("nak message", "err", err)
	}
}

// publishRejects publishes the records to the .rejected subject of
// subject, as NDJSON in messages that fit the server's payload limit.
// They are plain NATS publishes: a stream an operator points at the
// .rejected subjects keeps them. A failure is counted, not retried: the
// lines' outcome is already committed and counted.
func (s *Source) publishRejects(subject string, seq uint64, recs []Rejection) {
	if len(recs) == 0 {
		return
	}
	out, ok := s.rejectOut[subject]
	if !ok {
		out = RejectedSubject(subject)
	}
	limit := int(s.nc.MaxPayload()) - 1024
	var body []byte
	flush := func() {
		if len(body) == 0 {
			return
		}
		m := nats.NewMsg(out)
		m.Header.Set(HeaderSource, s.cfg.Name)
		m.Header.Set(HeaderSequence, strconv.FormatUint(seq, 10))
		m.Data = body
		if err := s.nc.PublishMsg(m); err != nil {
			s.m.rejectsErrors.WithLabelValues(s.cfg.Name).Inc()
			s.log.Warn("publish rejected lines", "subject", out, "err", err)
		}
		body = nil
	}
	for _, r := range recs {
		line, err := json.Marshal(r)
		if err != nil {
			continue // a Rejection always marshals
		}
		if len(body)+len(line)+1 > limit {
			flush()
		}
		body = append(append(body, line...), '\n')
		s.m.rejectsOut.WithLabelValues(s.cfg.Name).Inc()
	}
	flush()
}

// rejections pairs each rejected line of res with its text in body.
func rejections(body []byte, f collector.Format, res collector.Result) []Rejection {
	if len(res.Rejected) == 0 && res.RejectedOmitted == 0 {
		return nil
	}
	lines := splitLines(body, f)
	recs := make([]Rejection, 0, len(res.Rejected)+1)
	for _, le := range res.Rejected {
		var text []byte
		if le.Line >= 1 && le.Line <= len(lines) {
			text = lines[le.Line-1]
		}
		recs = append(recs, record(le.Line, le.Error, text))
	}
	if res.RejectedOmitted > 0 {
		recs = append(recs, Rejection{Error: fmt.Sprintf("%d more rejected lines are not listed", res.RejectedOmitted)})
	}
	return recs
}

func record(line int, why string, text []byte) Rejection {
	r := Rejection{Line: line, Error: why}
	if len(text) > maxOriginal {
		text, r.Truncated = text[:maxOriginal], true
	}
	r.Original = string(bytes.ToValidUTF8(text, []byte("\uFFFD")))
	return r
}

// splitLines returns the lines of a body as the collector numbers them:
// the elements of a JSON array (line = index + 1), the whole body for one
// JSON object, the physical lines of NDJSON. FormatAuto is resolved as
// the collector does (see collector.FormatAuto).
func splitLines(body []byte, f collector.Format) [][]byte {
	body = bytes.TrimPrefix(body, []byte("\xef\xbb\xbf"))
	rest := bytes.TrimLeft(body, " \t\r\n")
	if f == collector.FormatAuto {
		f = collector.NDJSON
		if len(rest) > 0 && rest[0] == '[' {
			f = collector.JSON
		} else if len(rest) > 0 && rest[0] == '{' {
			if first, _, _ := bytes.Cut(rest, []byte("\n")); !json.Valid(bytes.TrimSpace(first)) {
				f = collector.JSON
			}
		}
	}
	if f == collector.JSON {
		var elems []json.RawMessage
		if len(rest) > 0 && rest[0] == '[' && json.Unmarshal(rest, &elems) == nil {
			out := make([][]byte, len(elems))
			for i, e := range elems {
				out[i] = e
			}
			return out
		}
		return [][]byte{bytes.TrimSpace(rest)}
	}
	lines := bytes.Split(body, []byte("\n"))
	for i, l := range lines {
		lines[i] = bytes.TrimSuffix(l, []byte("\r"))
	}
	return lines
}
