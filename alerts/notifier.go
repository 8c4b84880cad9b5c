package alerts

import (
	"bytes"
	"cmp"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"slices"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/windows"
)

// Notifier delivers alerts to one receiver. Notify reports retry=true when
// the failure is worth another attempt (a network error or a 5xx answer).
// Implementations are safe for concurrent use.
type Notifier interface {
	Notify(ctx context.Context, alerts ...Alert) (retry bool, err error)
}

// Notifier types.
const (
	TypeAlertmanager = "alertmanager" // Alertmanager API v2
	TypeWebhook      = "webhook"      // classwatch's own JSON payload, version 1
)

// Notifier defaults.
const (
	DefaultTimeout        = 10 * time.Second
	DefaultMaxAttempts    = 5
	DefaultRetryWait      = time.Second
	DefaultQueueSize      = 1000
	DefaultResendInterval = time.Minute
)

// Secret is a string kept out of logs and printed config.
type Secret string

// String hides the secret.
func (s Secret) String() string {
	if s == "" {
		return ""
	}
	return "<secret>"
}

// MarshalText hides the secret from JSON and YAML encoders.
func (s Secret) MarshalText() ([]byte, error) { return []byte(s.String()), nil }

// NotifierConfig configures one notifier.
type NotifierConfig struct {
	Name string
	// Type is TypeAlertmanager or TypeWebhook.
	Type string
	// URL is the Alertmanager's base URL (alerts go to URL/api/v2/alerts)
	// or the webhook's full URL.
	URL Secret
	// BearerToken, or the contents of BearerTokenFile, is sent as an
	// "Authorization: Bearer" header.
	BearerToken     Secret
	BearerTokenFile string
	// Timeout bounds each attempt; MaxAttempts counts the first one;
	// RetryWait is the first pause between attempts, doubled each time.
	Timeout     time.Duration
	MaxAttempts int
	RetryWait   time.Duration
	// QueueSize bounds the alerts waiting for this notifier; when full, the
	// oldest is dropped.
	QueueSize int
	// ResendInterval is how often firing alerts are sent again to an
	// Alertmanager, which forgets an alert whose end time passed.
	ResendInterval time.Duration
}

var notifierKeys = []string{"name", "type", "url", "bearer_token", "bearer_token_file",
	"timeout", "max_attempts", "retry_wait", "queue_size"}

// notifierYAML is a notifier as written.
type notifierYAML struct {
	Name            string `yaml:"name"`
	Type            string `yaml:"type"`
	URL             string `yaml:"url"`
	BearerToken     string `yaml:"bearer_token"`
	BearerTokenFile string `yaml:"bearer_token_file"`
	Timeout         string `yaml:"timeout"`
	MaxAttempts     *int   `yaml:"max_attempts"`
	RetryWait       string `yaml:"retry_wait"`
	QueueSize       *int   `yaml:"queue_size"`
	ResendInterval  string `yaml:"resend_interval"`
}

// ParseNotifiers reads the notifiers section of the daemon's config, a
// sequence of notifiers, with the same strictness as ParseRules. Defaults
// are filled in. A nil, zero or null node means no notifiers.
func ParseNotifiers(node *yaml.Node) ([]NotifierConfig, error) {
	items, err := sequence(node, "notifiers")
	if err != nil || len(items) == 0 {
		return nil, err
	}
	var (
		out   []NotifierConfig
		errs  []error
		names = make(map[string]bool, len(items))
	)
	for i, n := range items {
		label := ruleLabel(stringValue(n, "name"), i)
		what := "notifier " + label
		fail := func(line int, format string, args ...any) {
			errs = append(errs, fmt.Errorf("line %d: %s: %s", line, what, fmt.Sprintf(format, args...)))
		}
		// resend_interval is checked against the type with the values.
		allowed := append(slices.Clone(notifierKeys), "resend_interval")
		if kerrs := checkKeys(n, what, allowed); len(kerrs) > 0 {
			errs = append(errs, kerrs...)
			continue
		}
		var y notifierYAML
		if err := n.Decode(&y); err != nil {
			errs = append(errs, decodeErrors(err, what)...)
			continue
		}
		c := NotifierConfig{
			Name: y.Name, Type: y.Type, URL: Secret(y.URL),
			BearerToken: Secret(y.BearerToken), BearerTokenFile: y.BearerTokenFile,
		}
		for _, d := range []struct {
			key string
			s   string
			d   *time.Duration
		}{{"timeout", y.Timeout, &c.Timeout}, {"retry_wait", y.RetryWait, &c.RetryWait}, {"resend_interval", y.ResendInterval, &c.ResendInterval}} {
			if d.s == "" {
				continue
			}
			v, err := windows.ParseDuration(d.s)
			if err != nil || v <= 0 {
				fail(valueLine(n, d.key), "%s: %q is not a positive duration", d.key, d.s)
				continue
			}
			*d.d = v
		}
		for _, p := range []struct {
			key string
			v   *int
			to  *int
		}{{"max_attempts", y.MaxAttempts, &c.MaxAttempts}, {"queue_size", y.QueueSize, &c.QueueSize}} {
			if p.v == nil {
				continue
			}
			if *p.v < 1 {
				fail(valueLine(n, p.key), "%s: must be at least 1", p.key)
				continue
			}
			*p.to = *p.v
		}
		c = c.withDefaults()
		for _, fe := range c.check() {
			fail(valueLine(n, fe.key), "%v", fe)
		}
		if c.Name != "" && names[c.Name] {
			fail(valueLine(n, "name"), "name: repeated")
		}
		names[c.Name] = true
		out = append(out, c)
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return out, nil
}

// withDefaults fills in the settings left out.
func (c NotifierConfig) withDefaults() NotifierConfig {
	c.Timeout = cmp.Or(c.Timeout, DefaultTimeout)
	c.MaxAttempts = cmp.Or(c.MaxAttempts, DefaultMaxAttempts)
	c.RetryWait = cmp.Or(c.RetryWait, DefaultRetryWait)
	c.QueueSize = cmp.Or(c.QueueSize, DefaultQueueSize)
	if c.Type == TypeAlertmanager {
		c.ResendInterval = cmp.Or(c.ResendInterval, DefaultResendInterval)
	}
	return c
}

// check reports problems of a config with defaults filled in. Messages
// never quote the URL or the token.
func (c NotifierConfig) check() []fieldError {
	var errs []fieldError
	bad := func(key, format string, args ...any) {
		errs = append(errs, fieldError{key, fmt.Sprintf(format, args...)})
	}
	switch {
	case c.Name == "":
		bad("name", "required")
	case !nameRE.MatchString(c.Name):
		bad("name", "%q: use letters, digits and _ . : - (starting with a letter or digit)", c.Name)
	}
	switch c.Type {
	case TypeAlertmanager, TypeWebhook:
	case "":
		bad("type", "required (alertmanager or webhook)")
	default:
		bad("type", "%q is not one of alertmanager, webhook", c.Type)
	}
	if u, err := url.Parse(string(c.URL)); err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		bad("url", "must be an absolute http or https URL")
	}
	if c.BearerToken != "" && c.BearerTokenFile != "" {
		bad("bearer_token", "give bearer_token or bearer_token_file, not both")
	}
	if c.Type != TypeAlertmanager && c.ResendInterval != 0 {
		bad("resend_interval", "applies to alertmanager notifiers only")
	}
	for _, d := range []struct {
		key string
		v   time.Duration
	}{{"timeout", c.Timeout}, {"retry_wait", c.RetryWait}} {
		if d.v <= 0 {
			bad(d.key, "must be positive")
		}
	}
	if c.MaxAttempts < 1 {
		bad("max_attempts", "must be at least 1")
	}
	if c.QueueSize < 1 {
		bad("queue_size", "must be at least 1")
	}
	return errs
}

// build makes the notifier the config describes, reading the token file.
func (c NotifierConfig) build(client *http.Client, now func() time.Time) (Notifier, error) {
	token := c.BearerToken
	if c.BearerTokenFile != "" {
		b, err := os.ReadFile(c.BearerTokenFile)
		if err != nil {
			return nil, fmt.Errorf("notifier %s: read bearer token file: %w", c.Name, err)
		}
		token = Secret(strings.TrimSpace(string(b)))
	}
	p := poster{name: c.Name, url: string(c.URL), token: string(token), client: client}
	switch c.Type {
	case TypeAlertmanager:
		p.url = strings.TrimSuffix(p.url, "/") + "/api/v2/alerts"
		return &Alertmanager{post: p, validFor: 4 * c.ResendInterval, now: now}, nil
	default:
		return &Webhook{post: p, now: now}, nil
	}
}

// poster sends one JSON body to a URL and classifies the outcome.
type poster struct {
	name   string
	url    string
	token  string
	client *http.Client
}

// post sends body. A network error or a 5xx or 429 answer is worth a
// retry; other non-2xx answers are not. Errors never contain the URL's
// path, query or credentials, nor the token.
func (p poster) post(ctx context.Context, body []byte) (retry bool, err error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, p.url, bytes.NewReader(body))
	if err != nil {
		return false, p.redact(fmt.Errorf("build request: %w", err))
	}
	req.Header.Set("Content-Type", "application/json")
	req.Header.Set("User-Agent", "classwatch")
	if p.token != "" {
		req.Header.Set("Authorization", "Bearer "+p.token)
	}
	resp, err := p.client.Do(req)
	if err != nil {
		if cause := context.Cause(ctx); cause != nil && ctx.Err() != nil {
			err = cause
		}
		return true, p.redact(err)
	}
	defer resp.Body.Close()
	// Read a little of the answer for the error message, and drain the
	// rest so the connection can be reused.
	snippet, _ := io.ReadAll(io.LimitReader(resp.Body, 256))
	_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 1<<20))
	if resp.StatusCode/100 == 2 {
		return false, nil
	}
	err = p.redact(fmt.Errorf("%s answered %s: %s", p.where(), resp.Status, strings.TrimSpace(string(snippet))))
	return resp.StatusCode/100 == 5 || resp.StatusCode == http.StatusTooManyRequests, err
}

// where names the receiver without the URL's path, query or credentials.
func (p poster) where() string {
	u, err := url.Parse(p.url)
	if err != nil {
		return "notifier " + p.name
	}
	return fmt.Sprintf("notifier %s (%s://%s)", p.name, u.Scheme, u.Host)
}

// redact rewrites err so that neither the URL nor the token appears in it.
// A *url.Error (what http.Client returns) is rebuilt around its cause.
func (p poster) redact(err error) error {
	var ue *url.Error
	if errors.As(err, &ue) {
		err = fmt.Errorf("%s: %s: %w", p.where(), strings.ToLower(ue.Op), ue.Err)
	}
	msg := err.Error()
	secrets := []string{p.url}
	if u, perr := url.Parse(p.url); perr == nil {
		secrets = append(secrets, u.String(), u.RawQuery, u.EscapedPath())
		if u.User != nil {
			secrets = append(secrets, u.User.String())
		}
	}
	if p.token != "" {
		secrets = append(secrets, p.token)
	}
	clean := msg
	for _, s := range secrets {
		if len(s) > 1 {
			clean = strings.ReplaceAll(clean, s, "<redacted>")
		}
	}
	if clean == msg {
		return err
	}
	return redactedError{msg: clean, err: err}
}

// redactedError carries a cleaned message while keeping the cause for
// errors.Is (for example context.DeadlineExceeded).
type redactedError struct {
	msg string
	err error
}

func (e redactedError) Error() string { return e.msg }
func (e redactedError) Unwrap() error { return errors.Unwrap(e.err) }
