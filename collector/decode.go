package collector

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"reflect"
	"strings"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Format is the encoding of a body or file.
type Format int

// Formats.
const (
	// FormatAuto detects the format from the start of the body: a JSON
	// array, or a first line that is not a complete JSON value but starts
	// an object, is JSON; anything else is NDJSON.
	FormatAuto Format = iota
	// NDJSON is one JSON object per line.
	NDJSON
	// JSON is one JSON object or an array of objects.
	JSON
)

// LineTooLongError reports a line or array element over
// Limits.MaxLineBytes.
type LineTooLongError struct {
	Line  int
	Limit int
}

// Error names the line and the limit.
func (e *LineTooLongError) Error() string {
	return fmt.Sprintf("line %d is longer than the %d-byte line limit", e.Line, e.Limit)
}

// BodyError reports a body that cannot be split into lines: a JSON body
// that is not valid JSON as a whole.
type BodyError struct {
	Err error
}

// Error describes the parse failure.
func (e *BodyError) Error() string { return "body cannot be parsed: " + e.Err.Error() }

// Unwrap returns the parse error.
func (e *BodyError) Unwrap() error { return e.Err }

// lineSource yields the non-blank lines of an input in order. The returned
// slice is valid until the next call. A line over the limit is reported as
// a *LineTooLongError with the source positioned after it; io.EOF ends the
// input.
type lineSource interface {
	next() (line int, data []byte, err error)
}

func newLineSource(r io.Reader, f Format, maxLine int) lineSource {
	// The buffer holds a full line plus its "\r\n".
	br := bufio.NewReaderSize(r, maxLine+2)
	if f == FormatAuto {
		f = detectFormat(br)
	}
	if f == JSON {
		return newJSONSource(br, maxLine)
	}
	return &ndjsonSource{r: br, max: maxLine}
}

// detectFormat tells JSON from NDJSON by the first line of br, which it
// peeks without consuming (but for a byte order mark). Read errors are left
// for the source to meet again.
func detectFormat(br *bufio.Reader) Format {
	if bom, _ := br.Peek(3); string(bom) == "\xef\xbb\xbf" {
		_, _ = br.Discard(3)
	}
	head, _ := br.Peek(br.Size())
	rest := bytes.TrimLeft(head, " \t\r\n")
	if len(rest) == 0 {
		return NDJSON
	}
	switch rest[0] {
	case '[':
		return JSON
	case '{':
		first, _, found := bytes.Cut(rest, []byte("\n"))
		if !found && len(head) == br.Size() {
			return NDJSON // an over-long first line: NDJSON reports it
		}
		if !json.Valid(bytes.TrimSpace(first)) {
			return JSON // an object spread over several lines
		}
	}
	return NDJSON
}

// ndjsonSource reads NDJSON line by line without holding more than one
// line's worth of buffer.
type ndjsonSource struct {
	r    *bufio.Reader
	max  int
	line int
	eof  bool
}

func (s *ndjsonSource) next() (int, []byte, error) {
	for !s.eof {
		s.line++
		data, err := s.r.ReadSlice('\n')
		if errors.Is(err, bufio.ErrBufferFull) {
			// Skip the rest of the over-long line so the caller may go on.
			for errors.Is(err, bufio.ErrBufferFull) {
				_, err = s.r.ReadSlice('\n')
			}
			if err != nil && !errors.Is(err, io.EOF) {
				return s.line, nil, err
			}
			s.eof = err != nil
			return s.line, nil, &LineTooLongError{Line: s.line, Limit: s.max}
		}
		switch {
		case errors.Is(err, io.EOF):
			s.eof = true
		case err != nil:
			return s.line, nil, err
		}
		if s.line == 1 {
			data = bytes.TrimPrefix(data, []byte("\xef\xbb\xbf")) // UTF-8 byte order mark
		}
		data = bytes.TrimRight(data, "\r\n")
		if len(data) > s.max {
			return s.line, nil, &LineTooLongError{Line: s.line, Limit: s.max}
		}
		if len(bytes.TrimSpace(data)) == 0 {
			continue
		}
		return s.line, data, nil
	}
	return s.line, nil, io.EOF
}

// jsonSource reads one JSON object, or the elements of a JSON array one by
// one; an element's line number is its index + 1.
type jsonSource struct {
	br      *bufio.Reader
	dec     *json.Decoder
	max     int
	line    int
	started bool
	array   bool
	done    bool
	raw     json.RawMessage
}

func newJSONSource(br *bufio.Reader, maxLine int) *jsonSource {
	return &jsonSource{br: br, dec: json.NewDecoder(br), max: maxLine}
}

func (s *jsonSource) next() (int, []byte, error) {
	if s.done {
		return s.line, nil, io.EOF
	}
	if !s.started {
		s.started = true
		first, err := s.firstByte()
		if err != nil {
			return 0, nil, err
		}
		if first == '[' {
			s.array = true
			if _, err := s.dec.Token(); err != nil {
				return 0, nil, s.bodyErr(err)
			}
		}
	}
	if s.array && !s.dec.More() {
		s.done = true
		if _, err := s.dec.Token(); err != nil { // the closing ']'
			return s.line, nil, s.bodyErr(err)
		}
		return s.line, nil, s.end()
	}
	s.raw = s.raw[:0]
	if err := s.dec.Decode(&s.raw); err != nil {
		return s.line + 1, nil, s.bodyErr(err)
	}
	s.line++
	if !s.array {
		s.done = true
		if err := s.end(); !errors.Is(err, io.EOF) {
			return s.line, nil, err
		}
	}
	if len(s.raw) > s.max {
		return s.line, nil, &LineTooLongError{Line: s.line, Limit: s.max}
	}
	return s.line, s.raw, nil
}

// firstByte peeks the first non-space byte of the body.
func (s *jsonSource) firstByte() (byte, error) {
	for {
		b, err := s.br.ReadByte()
		if errors.Is(err, io.EOF) {
			return 0, &BodyError{Err: errors.New("empty body")}
		}
		if err != nil {
			return 0, err
		}
		if b != ' ' && b != '\t' && b != '\r' && b != '\n' {
			return b, s.br.UnreadByte()
		}
	}
}

// end checks that nothing but white space follows the top-level value and
// returns io.EOF if so.
func (s *jsonSource) end() error {
	_, err := s.dec.Token()
	switch {
	case errors.Is(err, io.EOF):
		return io.EOF
	case err == nil:
		return &BodyError{Err: errors.New("data after the top-level value (send one object per line as application/x-ndjson)")}
	}
	return s.bodyErr(err)
}

// bodyErr wraps JSON syntax problems as a *BodyError and passes read
// errors (such as *http.MaxBytesError) through.
func (s *jsonSource) bodyErr(err error) error {
	var se *json.SyntaxError
	if errors.As(err, &se) || errors.Is(err, io.ErrUnexpectedEOF) {
		return &BodyError{Err: err}
	}
	return err
}

// predictionLine is the wire form of a prediction.
type predictionLine struct {
	Model     string             `json:"model"`
	ID        string             `json:"id"`
	At        string             `json:"at"`
	Predicted string             `json:"predicted"`
	Scores    map[string]float64 `json:"scores"`
	Segment   string             `json:"segment"`
}

// predictionFields and labelFields are the field names of the wire forms.
var (
	predictionFields = []string{"model", "id", "at", "predicted", "scores", "segment"}
	labelFields      = []string{"model", "id", "actual", "at"}
)

// labelLine is the wire form of a label.
type labelLine struct {
	Model  string `json:"model"`
	ID     string `json:"id"`
	Actual string `json:"actual"`
	At     string `json:"at"`
}

// parsePrediction decodes and checks one prediction line, with At defaulted
// to now. Bucket and the model's classes are left to the caller.
func parsePrediction(data []byte, now time.Time, maxFuture time.Duration) (store.Prediction, error) {
	pl, ok := scanPrediction(string(data))
	if !ok {
		// A variable of its own, so that only this path allocates it.
		var full predictionLine
		if err := decodeLine(data, &full, predictionFields, "scores"); err != nil {
			// The model, when it could be read, still names the line in metrics.
			return store.Prediction{Model: full.Model}, err
		}
		pl = full
	}
	p := store.Prediction{Model: pl.Model, ID: pl.ID, Predicted: pl.Predicted, Segment: pl.Segment, Scores: pl.Scores}
	if err := checkKey(pl.Model, pl.ID); err != nil {
		return p, err
	}
	if pl.Predicted == "" {
		return p, errors.New(`"predicted" is required`)
	}
	if err := ValidClassName(pl.Predicted); err != nil {
		return p, fmt.Errorf(`"predicted": %w`, err)
	}
	if len(pl.Segment) > maxSegmentBytes {
		return p, fmt.Errorf(`"segment" is longer than %d bytes`, maxSegmentBytes)
	}
	if err := checkText(`"segment"`, pl.Segment); err != nil {
		return p, err
	}
	if err := checkScores(pl.Scores); err != nil {
		return p, err
	}
	var err error
	p.At, p.AtDefaulted, err = parseAt(pl.At, now, maxFuture)
	return p, err
}

// scoreSumSlack is how far above 1 a set of scores may sum, for rounding
// in the client (README "Early warning").
const scoreSumSlack = 0.02

// checkScores checks score names and values: each in [0, 1], together at
// most 1 + scoreSumSlack; they may cover only some classes (README "Early
// warning"). Of several bad scores it names the one whose class sorts
// first, so that the message does not depend on map order.
func checkScores(scores map[string]float64) error {
	bad, found, sum := "", false, 0.0
	for k, v := range scores {
		sum += v
		if ValidClassName(k) != nil || math.IsNaN(v) || v < 0 || v > 1 {
			if !found || k < bad {
				bad, found = k, true
			}
		}
	}
	if !found {
		if sum > 1+scoreSumSlack {
			return fmt.Errorf(`"scores" sum to %.4g, more than 1 (by more than %g)`, sum, scoreSumSlack)
		}
		return nil
	}
	if err := ValidClassName(bad); err != nil {
		return fmt.Errorf(`"scores": %w`, err)
	}
	return fmt.Errorf(`"scores": %q is %v, outside [0, 1]`, bad, scores[bad])
}

// parseLabel decodes and checks one label line, with At defaulted to now.
func parseLabel(data []byte, now time.Time, maxFuture time.Duration) (store.Label, error) {
	ll, ok := scanLabel(string(data))
	if !ok {
		var full labelLine
		if err := decodeLine(data, &full, labelFields, ""); err != nil {
			return store.Label{Model: full.Model}, err
		}
		ll = full
	}
	l := store.Label{Model: ll.Model, ID: ll.ID, Actual: ll.Actual}
	if err := checkKey(ll.Model, ll.ID); err != nil {
		return l, err
	}
	if ll.Actual == "" {
		return l, errors.New(`"actual" is required`)
	}
	if err := ValidClassName(ll.Actual); err != nil {
		return l, fmt.Errorf(`"actual": %w`, err)
	}
	var err error
	l.At, _, err = parseAt(ll.At, now, maxFuture)
	return l, err
}

func checkKey(model, id string) error {
	switch {
	case model == "":
		return errors.New(`"model" is required`)
	case id == "":
		return errors.New(`"id" is required`)
	case len(id) > maxIDBytes:
		return fmt.Errorf(`"id" is longer than %d bytes`, maxIDBytes)
	}
	if err := checkText(`"model"`, model); err != nil {
		return err
	}
	return checkText(`"id"`, id)
}

// parseAt reads an optional RFC 3339 time; empty means now (defaulted).
func parseAt(s string, now time.Time, maxFuture time.Duration) (t time.Time, defaulted bool, err error) {
	if s == "" {
		return now.UTC(), true, nil
	}
	t, err = time.Parse(time.RFC3339, s)
	if err != nil {
		return time.Time{}, false, fmt.Errorf(`"at": %q is not an RFC 3339 time such as "2026-03-01T12:00:00Z"`, s)
	}
	// Bucket arithmetic works on Unix nanoseconds (years 1678 to 2262) and
	// the windows read buckets up to 2200.
	if t.Year() < 1970 || t.Year() >= 2200 {
		return time.Time{}, false, fmt.Errorf(`"at": %s is not in the years 1970 to 2199`, s)
	}
	if maxFuture >= 0 && t.Sub(now) > maxFuture {
		return time.Time{}, false, fmt.Errorf(`"at": %s is more than %s ahead of the receive time %s`, s, maxFuture, now.UTC().Format(time.RFC3339))
	}
	return t.UTC(), false, nil
}

func describeJSONError(err error) error {
	var se *json.SyntaxError
	var te *json.UnmarshalTypeError
	switch {
	case errors.As(err, &se) && strings.HasSuffix(se.Error(), "after top-level value"):
		return errors.New("unexpected data after the JSON object")
	case errors.As(err, &se) && strings.HasPrefix(se.Error(), "unexpected end of JSON input"):
		return errors.New("invalid JSON: the object is cut short")
	case errors.As(err, &se):
		return fmt.Errorf("invalid JSON at byte %d: %s", se.Offset, strings.TrimPrefix(se.Error(), "json: "))
	case errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, io.EOF):
		return errors.New("invalid JSON: the object is cut short")
	case errors.As(err, &te):
		if te.Field == "" {
			return fmt.Errorf("a line must be a JSON object, not %s", article(te.Value))
		}
		if strings.HasPrefix(te.Value, "number ") {
			return fmt.Errorf("%q: %s is out of range", te.Field, strings.TrimPrefix(te.Value, "number "))
		}
		return fmt.Errorf("%q must be %s, not %s", te.Field, describeType(te.Type), article(te.Value))
	}
	if name, ok := strings.CutPrefix(err.Error(), "json: unknown field "); ok {
		return fmt.Errorf("unknown field %s", name)
	}
	return errors.New(strings.TrimPrefix(err.Error(), "json: "))
}

func describeType(t reflect.Type) string {
	switch t.Kind() {
	case reflect.String:
		return "a string"
	case reflect.Float64:
		return "a number"
	case reflect.Map, reflect.Struct:
		return "an object"
	}
	return t.String()
}

func article(jsonKind string) string {
	switch jsonKind {
	case "array", "object":
		return "an " + jsonKind
	case "number", "string":
		return "a " + jsonKind
	}
	return jsonKind // "bool", "null"
}
