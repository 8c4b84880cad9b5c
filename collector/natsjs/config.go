package natsjs

import (
	"cmp"
	"errors"
	"fmt"
	"net/url"
	"strings"
	"time"
)

// Defaults applied by New to zero Config fields.
const (
	DefaultName          = "nats"
	DefaultFetchMessages = 64
	DefaultFetchBytes    = 16 << 20
	DefaultWorkers       = 4
	DefaultAckWait       = 60 * time.Second
	DefaultNakDelay      = 2 * time.Second
	DefaultLagEvery      = 5 * time.Second
)

// Config is one stream source.
type Config struct {
	// Name labels the source's metrics and line counters; default "nats".
	Name string
	// URL is the NATS server (nats:// or tls://); a comma-separated list
	// names several servers of one cluster.
	URL string
	// Stream is created with the two subjects when it does not exist.
	Stream             string
	PredictionsSubject string
	LabelsSubject      string
	// Durable names the pull consumer that every replica shares.
	Durable string

	// Token, or User and Password, or CredentialsFile authenticate the
	// connection; the caller reads secrets from the environment.
	Token           string
	User            string
	Password        string
	CredentialsFile string
	// TLS to NATS: a CA file to verify the server, and a client
	// certificate and key for mutual TLS. TLS is used when any is set or
	// the URL's scheme is tls://.
	CAFile   string
	CertFile string
	KeyFile  string

	// FetchMessages and FetchBytes bound what a replica pulls ahead of its
	// workers: the messages requested from the consumer and not yet
	// handled.
	FetchMessages int
	FetchBytes    int
	// Workers is how many messages are submitted at once.
	Workers int
	// AckWait is the consumer's redelivery timeout, set when the consumer
	// is created; it must exceed the time a message takes to commit.
	AckWait time.Duration
	// NakDelay is how long a message waits before redelivery when the
	// store could not commit it or the collector was busy.
	NakDelay time.Duration
	// LagEvery is how often the consumer's pending counts are read.
	LagEvery time.Duration
}

// withDefaults fills the zero fields.
func (c Config) withDefaults() Config {
	c.Name = cmp.Or(c.Name, DefaultName)
	c.FetchMessages = cmp.Or(c.FetchMessages, DefaultFetchMessages)
	c.FetchBytes = cmp.Or(c.FetchBytes, DefaultFetchBytes)
	c.Workers = cmp.Or(c.Workers, DefaultWorkers)
	c.AckWait = cmp.Or(c.AckWait, DefaultAckWait)
	c.NakDelay = cmp.Or(c.NakDelay, DefaultNakDelay)
	c.LagEvery = cmp.Or(c.LagEvery, DefaultLagEvery)
	return c
}

// Check reports the first problem of a configuration with its defaults
// applied; the daemon's config loader reports the same problems by key.
func (c Config) Check() error {
	c = c.withDefaults()
	var errs []error
	bad := func(format string, args ...any) { errs = append(errs, fmt.Errorf(format, args...)) }
	if err := CheckURL(c.URL); err != nil {
		bad("url: %v", err)
	}
	if err := CheckName(c.Stream); err != nil {
		bad("stream: %v", err)
	}
	if err := CheckName(c.Durable); err != nil {
		bad("durable: %v", err)
	}
	for _, s := range []struct{ key, subject string }{
		{"predictions_subject", c.PredictionsSubject}, {"labels_subject", c.LabelsSubject},
	} {
		if err := CheckSubject(s.subject); err != nil {
			bad("%s: %v", s.key, err)
		}
	}
	if c.PredictionsSubject != "" && c.PredictionsSubject == c.LabelsSubject {
		bad("predictions_subject and labels_subject are the same subject")
	}
	if (c.CertFile == "") != (c.KeyFile == "") {
		bad("cert_file and key_file go together")
	}
	if c.Token != "" && (c.User != "" || c.CredentialsFile != "") || c.User != "" && c.CredentialsFile != "" {
		bad("use one of token, user and password, or credentials file")
	}
	if c.User != "" && c.Password == "" {
		bad("user needs a password")
	}
	if c.FetchMessages < 1 || c.FetchBytes < 1 || c.Workers < 1 {
		bad("fetch_messages, fetch_bytes and workers must be positive")
	}
	if c.AckWait < time.Second || c.NakDelay < 0 || c.LagEvery < 0 {
		bad("ack_wait must be at least 1s; nak_delay must not be negative")
	}
	return errors.Join(errs...)
}

// CheckURL accepts one server URL, or a comma-separated list of them, of
// the form nats://host:port or tls://host:port without credentials.
func CheckURL(list string) error {
	if strings.TrimSpace(list) == "" {
		return errors.New("is required")
	}
	for _, u := range strings.Split(list, ",") {
		u = strings.TrimSpace(u)
		p, err := url.Parse(u)
		switch {
		case err != nil || (p.Scheme != "nats" && p.Scheme != "tls") || p.Host == "":
			return fmt.Errorf("%q is not nats://host:port or tls://host:port", RedactURL(u))
		case p.User != nil:
			return fmt.Errorf("%s carries credentials; use token_env, user and password_env, or credentials_file", RedactURL(u))
		}
	}
	return nil
}

// CheckName accepts a stream or consumer name: NATS forbids spaces, '.',
// '*', '>' and path separators in them.
func CheckName(s string) error {
	switch {
	case s == "":
		return errors.New("is required")
	case len(s) > 64:
		return fmt.Errorf("%q is longer than 64 bytes", s)
	case strings.ContainsAny(s, " \t\r\n.*>/\\"):
		return fmt.Errorf("%q may not hold spaces, '.', '*', '>', '/' or '\\'", s)
	}
	return nil
}

// CheckSubject accepts a literal NATS subject: dot-separated tokens, none
// empty, no wildcards (a message's subject says what it carries).
func CheckSubject(s string) error {
	if s == "" {
		return errors.New("is required")
	}
	if strings.ContainsAny(s, " \t\r\n") {
		return fmt.Errorf("%q holds white space", s)
	}
	for _, tok := range strings.Split(s, ".") {
		switch tok {
		case "":
			return fmt.Errorf("%q has an empty token", s)
		case "*", ">":
			return fmt.Errorf("%q holds a wildcard; name one subject", s)
		}
	}
	return nil
}

// RejectedSubject is where the rejected lines of messages on subject are
// published.
func RejectedSubject(subject string) string { return subject + ".rejected" }

// subjectMatches reports whether a literal subject falls under a stream's
// subject filter, which may hold the wildcards '*' (one token) and '>'
// (the rest).
func subjectMatches(filter, subject string) bool {
	ft, st := strings.Split(filter, "."), strings.Split(subject, ".")
	for i, f := range ft {
		if f == ">" {
			return len(st) > i
		}
		if i >= len(st) || f != "*" && f != st[i] {
			return false
		}
	}
	return len(ft) == len(st)
}

// RedactURL hides a password or token in a server URL.
func RedactURL(s string) string {
	u, err := url.Parse(s)
	if err != nil {
		return "<unparsable url>"
	}
	if u.User != nil {
		u.User = url.User("xxxxx")
	}
	return u.String()
}
