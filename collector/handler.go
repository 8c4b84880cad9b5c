package collector

import (
	"bytes"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"mime"
	"net/http"
	"strconv"
	"strings"
	"time"
)

// response is the body of every ingest answer.
type response struct {
	Result
	// Error explains why the request as a whole was refused.
	Error string `json:"error,omitempty"`
}

// Register adds POST /v1/predictions and POST /v1/labels to mux.
func (c *Collector) Register(mux *http.ServeMux) {
	mux.HandleFunc("POST /v1/predictions", c.handler(Predictions))
	mux.HandleFunc("POST /v1/labels", c.handler(Labels))
}

func (c *Collector) handler(k Kind) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		code := c.serve(w, r, k)
		c.metrics.requestDuration.WithLabelValues(k.String(), strconv.Itoa(code)).Observe(time.Since(start).Seconds())
	}
}

// serve answers one ingest request and returns the status it sent.
func (c *Collector) serve(w http.ResponseWriter, r *http.Request, k Kind) int {
	tok, ok := c.authorize(r)
	if !ok {
		w.Header().Set("WWW-Authenticate", `Bearer realm="classwatch"`)
		return c.refuse(w, http.StatusUnauthorized, "missing or invalid bearer token")
	}
	format, err := requestFormat(r.Header.Get("Content-Type"))
	if err != nil {
		return c.refuse(w, http.StatusUnsupportedMediaType, err.Error())
	}
	if r.ContentLength > c.limits.MaxBodyBytes {
		return c.refuse(w, http.StatusRequestEntityTooLarge, c.tooLarge())
	}
	body, release, err := c.readBody(w, r)
	defer release()
	if err != nil {
		return c.refuseBody(w, k, err)
	}

	res, err := c.submit(r.Context(), k, bytes.NewReader(body), SubmitOptions{Format: format, Source: "http"}, tok)

	var (
		maxBytes *http.MaxBytesError
		tooBig   *TooLargeError
		tooLong  *LineTooLongError
		bodyErr  *BodyError
		storeErr *StoreError
	)
	switch {
	case errors.Is(err, ErrBusy):
		c.retryAfter(w)
		return c.refuse(w, http.StatusServiceUnavailable, "too many batches in flight; retry later")
	case errors.As(err, &maxBytes), errors.As(err, &tooBig):
		return c.refuse(w, http.StatusRequestEntityTooLarge, c.tooLarge())
	case errors.As(err, &tooLong):
		return c.refuse(w, http.StatusRequestEntityTooLarge, tooLong.Error())
	case errors.As(err, &bodyErr):
		return c.refuse(w, http.StatusBadRequest, bodyErr.Error())
	case errors.As(err, &storeErr):
		if r.Context().Err() == nil {
			c.log.Warn("ingest batch not committed", "endpoint", k.String(), "err", err)
		}
		c.retryAfter(w)
		return c.refuse(w, http.StatusServiceUnavailable, "store unavailable; nothing of this batch was kept, retry later")
	case err != nil:
		return c.refuse(w, http.StatusBadRequest, fmt.Sprintf("read body: %v", err))
	}

	resp := response{Result: res}
	code := http.StatusOK
	if res.Accepted+res.Duplicates == 0 {
		code = http.StatusBadRequest
		switch {
		case len(res.Rejected) == 0:
			resp.Error = "body holds no lines"
		case res.forbidden == len(res.Rejected)+res.RejectedOmitted:
			code = http.StatusForbidden
			resp.Error = "the token may not write any line's model"
		default:
			resp.Error = "every line was rejected"
		}
	}
	return c.write(w, code, resp)
}

func (c *Collector) tooLarge() string {
	return fmt.Sprintf("body is larger than the %d-byte limit", c.limits.MaxBodyBytes)
}

// authorize finds the request's token. With no tokens configured every
// request passes with a nil token.
func (c *Collector) authorize(r *http.Request) (*tokenHash, bool) {
	if len(c.tokens) == 0 {
		return nil, true
	}
	scheme, secret, ok := strings.Cut(r.Header.Get("Authorization"), " ")
	if !ok || !strings.EqualFold(scheme, "Bearer") || secret == "" {
		return nil, false
	}
	// Comparing fixed-size digests of every token, without stopping at a
	// match, keeps the time independent of which token (and of its length).
	sum := sha256.Sum256([]byte(strings.TrimSpace(secret)))
	var found *tokenHash
	for i := range c.tokens {
		if subtle.ConstantTimeCompare(sum[:], c.tokens[i].sum[:]) == 1 {
			found = &c.tokens[i]
		}
	}
	return found, found != nil
}

// requestFormat maps a Content-Type to a Format.
func requestFormat(contentType string) (Format, error) {
	if contentType == "" {
		return 0, errors.New("content type is missing; send application/x-ndjson or application/json")
	}
	mt, params, err := mime.ParseMediaType(contentType)
	if err != nil {
		return 0, fmt.Errorf("content type %q cannot be parsed", contentType)
	}
	if cs, ok := params["charset"]; ok && !strings.EqualFold(cs, "utf-8") {
		return 0, fmt.Errorf("charset %q is not supported; send UTF-8", cs)
	}
	switch mt {
	case "application/x-ndjson", "application/ndjson":
		return NDJSON, nil
	case "application/json":
		return JSON, nil
	}
	return 0, fmt.Errorf("content type %s is not supported; send application/x-ndjson or application/json", mt)
}

func (c *Collector) retryAfter(w http.ResponseWriter) {
	secs := int(math.Ceil(c.limits.RetryAfter.Seconds()))
	w.Header().Set("Retry-After", strconv.Itoa(max(secs, 1)))
}

// refuse answers a request refused as a whole.
func (c *Collector) refuse(w http.ResponseWriter, code int, msg string) int {
	return c.write(w, code, response{Result: Result{Rejected: []LineError{}}, Error: msg})
}

func (c *Collector) write(w http.ResponseWriter, code int, resp response) int {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(code)
	if err := json.NewEncoder(w).Encode(resp); err != nil {
		c.log.Debug("write ingest response", "err", err)
	}
	return code
}
