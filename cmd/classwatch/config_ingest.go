package main

import (
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/classwatch/classwatch/collector"
)

// ingestConfig bounds the push endpoints and lists their tokens.
type ingestConfig struct {
	MaxBodyBytes byteSize `yaml:"max_body_bytes"`
	MaxLineBytes byteSize `yaml:"max_line_bytes"`
	MaxInFlight  int      `yaml:"max_in_flight"`
	QueueWait    duration `yaml:"queue_wait"`
	// MaxFuture is how far ahead of the receive time an event time may
	// lie; 0 means no limit.
	MaxFuture  duration `yaml:"max_future"`
	RetryAfter duration `yaml:"retry_after"`
	// MinBodyRate is the slowest rate, per second, at which a request
	// body must arrive once BodyGrace has passed (else 408); 0 means no
	// minimum.
	MinBodyRate byteSize `yaml:"min_body_rate"`
	BodyGrace   duration `yaml:"body_grace"`
	// MaxBufferedBytes caps the bodies held in memory at once; 0 means
	// 2 × max_in_flight × max_body_bytes.
	MaxBufferedBytes byteSize `yaml:"max_buffered_bytes"`
	// BatchLines is the transaction size of "classwatch ingest".
	BatchLines int           `yaml:"batch_lines"`
	Tokens     []tokenConfig `yaml:"tokens"`
}

// tokenConfig is one bearer token. The secret comes from the environment
// variable named by TokenEnv, never from the file.
type tokenConfig struct {
	Name     string   `yaml:"name"`
	TokenEnv string   `yaml:"token_env"`
	Models   []string `yaml:"models,omitempty"`
	secret   string
}

// String describes the token without its secret.
func (t tokenConfig) String() string {
	return fmt.Sprintf("token %s (from $%s, models %v)", t.Name, t.TokenEnv, t.Models)
}

// GoString is String, so that %#v does not print the secret either.
func (t tokenConfig) GoString() string { return t.String() }

// defaultIngest returns the collector's default limits.
func defaultIngest() ingestConfig {
	return ingestConfig{
		MaxBodyBytes: collector.DefaultMaxBodyBytes,
		MaxLineBytes: collector.DefaultMaxLineBytes,
		MaxInFlight:  collector.DefaultMaxInFlight,
		QueueWait:    duration(collector.DefaultQueueWait),
		MaxFuture:    duration(collector.DefaultMaxFuture),
		RetryAfter:   duration(collector.DefaultRetryAfter),
		BatchLines:   collector.DefaultBatchLines,
		MinBodyRate:  collector.DefaultMinBodyRate,
		BodyGrace:    duration(collector.DefaultBodyGrace),
	}
}

// limits maps the section onto collector.Limits.
func (in ingestConfig) limits() collector.Limits {
	l := collector.Limits{
		MaxBodyBytes: int64(in.MaxBodyBytes),
		MaxLineBytes: int(in.MaxLineBytes),
		MaxInFlight:  in.MaxInFlight,
		QueueWait:    time.Duration(in.QueueWait),
		MaxFuture:    time.Duration(in.MaxFuture),
		RetryAfter:   time.Duration(in.RetryAfter),

		MinBodyRate:      int64(in.MinBodyRate),
		BodyGrace:        time.Duration(in.BodyGrace),
		MaxBufferedBytes: int64(in.MaxBufferedBytes),
	}
	if in.MaxFuture == 0 {
		l.MaxFuture = -1 // no limit
	}
	if in.MinBodyRate == 0 {
		l.MinBodyRate = -1 // no minimum
	}
	return l
}

// tokens maps the token list onto collector tokens, secrets included.
func (in ingestConfig) tokens() []collector.Token {
	var out []collector.Token
	for _, t := range in.Tokens {
		out = append(out, collector.Token{Name: t.Name, Secret: t.secret, Models: slices.Clone(t.Models)})
	}
	return out
}

// applyEnv reads each token's secret from its environment variable.
func (in *ingestConfig) applyEnv(getenv func(string) string) { applyTokenEnv(in.Tokens, getenv) }

// applyTokenEnv reads each token's secret from its environment variable,
// without surrounding white space.
func applyTokenEnv(tokens []tokenConfig, getenv func(string) string) {
	for i := range tokens {
		if env := tokens[i].TokenEnv; env != "" {
			tokens[i].secret = strings.TrimSpace(getenv(env))
		}
	}
}

// validate checks the limits.
func (in ingestConfig) validate(p *problems) {
	if in.MaxBodyBytes <= 0 {
		p.add("ingest.max_body_bytes", "must be positive")
	}
	if in.MaxLineBytes <= 0 || in.MaxLineBytes > in.MaxBodyBytes {
		p.add("ingest.max_line_bytes", "must be positive and at most max_body_bytes")
	}
	if in.MaxInFlight <= 0 {
		p.add("ingest.max_in_flight", "must be positive")
	}
	if in.QueueWait < 0 {
		p.add("ingest.queue_wait", "must not be negative")
	}
	if in.MaxFuture < 0 {
		p.add("ingest.max_future", "must not be negative (0 means no limit)")
	}
	if time.Duration(in.RetryAfter) < time.Second {
		p.add("ingest.retry_after", "must be at least 1s")
	}
	if in.BodyGrace < 0 {
		p.add("ingest.body_grace", "must not be negative")
	}
	if in.MaxBufferedBytes != 0 && in.MaxBufferedBytes < in.MaxBodyBytes {
		p.add("ingest.max_buffered_bytes", "must be at least max_body_bytes (0 means 2 × max_in_flight × max_body_bytes)")
	}
	if in.BatchLines <= 0 {
		p.add("ingest.batch_lines", "must be positive")
	}
}

// validateTokens checks the ingest token list against the models.
func (c config) validateTokens(p *problems, models map[string]bool, secrets bool) {
	checkTokens(p, "ingest.tokens", c.Ingest.Tokens, secrets)
	for i, t := range c.Ingest.Tokens {
		for j, m := range t.Models {
			if !models[m] && !c.AutoRegister {
				p.add(fmt.Sprintf("ingest.tokens[%d].models[%d]", i, j), "%q is not a configured model", m)
			}
		}
	}
}

// checkTokens checks a token list: each named once, each with its own
// secret. With secrets false (commands that serve no HTTP) the environment
// is not consulted.
func checkTokens(p *problems, path string, tokens []tokenConfig, secrets bool) {
	names, seen := map[string]bool{}, map[string]bool{}
	for i, t := range tokens {
		tp := fmt.Sprintf("%s[%d]", path, i)
		switch {
		case t.Name == "":
			p.add(tp+".name", "is required")
		case names[t.Name]:
			p.add(tp+".name", "token %q is listed twice", t.Name)
		}
		names[t.Name] = true
		switch {
		case t.TokenEnv == "":
			p.add(tp+".token_env", "is required: name the environment variable that holds the token")
		case !secrets:
		case t.secret == "":
			p.add(tp+".token_env", "environment variable %s is not set or empty", t.TokenEnv)
		case seen[t.secret]:
			p.add(tp+".token_env", "environment variable %s holds the same token as another entry", t.TokenEnv)
		}
		seen[t.secret] = true
	}
}
