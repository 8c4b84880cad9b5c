package main

import (
	"cmp"
	"fmt"
	"strings"
	"time"

	"github.com/classwatch/classwatch/collector/natsjs"
	"github.com/classwatch/classwatch/windows"
)

// sourceConfig is one entry of the sources section: a stream that
// classwatch consumes besides HTTP push (README.md "Stream source (NATS
// JetStream)"). Secrets come from environment variables, never the file.
type sourceConfig struct {
	// Kind is the stream engine; "nats" (JetStream) is the one there is.
	Kind               string `yaml:"kind"`
	Name               string `yaml:"name,omitempty"`
	URL                string `yaml:"url"`
	Stream             string `yaml:"stream"`
	PredictionsSubject string `yaml:"predictions_subject"`
	LabelsSubject      string `yaml:"labels_subject"`
	Durable            string `yaml:"durable"`

	TokenEnv        string     `yaml:"token_env,omitempty"`
	User            string     `yaml:"user,omitempty"`
	PasswordEnv     string     `yaml:"password_env,omitempty"`
	CredentialsFile string     `yaml:"credentials_file,omitempty"`
	TLS             *sourceTLS `yaml:"tls,omitempty"`

	FetchMessages int      `yaml:"fetch_messages,omitempty"`
	FetchBytes    byteSize `yaml:"fetch_bytes,omitempty"`
	Workers       int      `yaml:"workers,omitempty"`
	AckWait       duration `yaml:"ack_wait,omitempty"`
	NakDelay      duration `yaml:"nak_delay,omitempty"`

	token, password string
}

// sourceTLS is TLS to the stream's servers.
type sourceTLS struct {
	CAFile   string `yaml:"ca_file,omitempty"`
	CertFile string `yaml:"cert_file,omitempty"`
	KeyFile  string `yaml:"key_file,omitempty"`
}

// Defaults of a nats source's keys the file leaves out.
const (
	defaultSourceURL      = "nats://127.0.0.1:4222"
	defaultSourceStream   = "CLASSWATCH"
	defaultSourcePredSubj = "classwatch.predictions"
	defaultSourceLabSubj  = "classwatch.labels"
	defaultSourceDurable  = "classwatch"
)

// String describes the source without its secrets.
func (s sourceConfig) String() string {
	return fmt.Sprintf("source %s (%s %s, stream %s, durable %s)", s.Name, s.Kind, natsjs.RedactURL(s.URL), s.Stream, s.Durable)
}

// GoString is String, so that %#v does not print secrets either.
func (s sourceConfig) GoString() string { return s.String() }

// applySourceDefaults fills the keys a source leaves out.
func (c *config) applySourceDefaults() {
	for i := range c.Sources {
		s := &c.Sources[i]
		for _, f := range []struct {
			v   *string
			def string
		}{
			{&s.Name, natsjs.DefaultName}, {&s.URL, defaultSourceURL}, {&s.Stream, defaultSourceStream},
			{&s.PredictionsSubject, defaultSourcePredSubj}, {&s.LabelsSubject, defaultSourceLabSubj},
			{&s.Durable, defaultSourceDurable},
		} {
			if *f.v == "" {
				*f.v = f.def
			}
		}
	}
}

// applySourceEnv reads each source's token or password from the
// environment variable it names.
func (c *config) applySourceEnv(getenv func(string) string) {
	for i := range c.Sources {
		s := &c.Sources[i]
		if s.TokenEnv != "" {
			s.token = strings.TrimSpace(getenv(s.TokenEnv))
		}
		if s.PasswordEnv != "" {
			s.password = getenv(s.PasswordEnv)
		}
	}
}

// natsConfig maps a source onto natsjs.Config.
func (s sourceConfig) natsConfig() natsjs.Config {
	out := natsjs.Config{
		Name: s.Name, URL: s.URL, Stream: s.Stream,
		PredictionsSubject: s.PredictionsSubject, LabelsSubject: s.LabelsSubject, Durable: s.Durable,
		Token: s.token, User: s.User, Password: s.password, CredentialsFile: s.CredentialsFile,
		FetchMessages: s.FetchMessages, FetchBytes: int(s.FetchBytes),
		Workers: s.Workers, AckWait: time.Duration(s.AckWait), NakDelay: time.Duration(s.NakDelay),
	}
	if s.TLS != nil {
		out.CAFile, out.CertFile, out.KeyFile = s.TLS.CAFile, s.TLS.CertFile, s.TLS.KeyFile
	}
	return out
}

// validateSources checks each source key by key. With secrets, the
// environment variables a source names must be set.
func (c config) validateSources(p *problems, secrets bool) {
	names := map[string]bool{}
	for i, s := range c.Sources {
		sp := fmt.Sprintf("sources[%d]", i)
		if s.Kind != "nats" {
			p.add(sp+".kind", "%q is not a source kind (the one there is: nats)", s.Kind)
			continue
		}
		if names[s.Name] {
			key := sp + ".name"
			if _, inFile := c.lines[key]; !inFile {
				key = sp // the default name: point at the entry
			}
			p.add(key, "source %q is listed twice; give each source its own name", s.Name)
		}
		names[s.Name] = true
		if err := natsjs.CheckURL(s.URL); err != nil {
			p.add(sp+".url", "%v", err)
		}
		if err := natsjs.CheckName(s.Stream); err != nil {
			p.add(sp+".stream", "%v", err)
		}
		if err := natsjs.CheckName(s.Durable); err != nil {
			p.add(sp+".durable", "%v", err)
		}
		if err := natsjs.CheckSubject(s.PredictionsSubject); err != nil {
			p.add(sp+".predictions_subject", "%v", err)
		}
		if err := natsjs.CheckSubject(s.LabelsSubject); err != nil {
			p.add(sp+".labels_subject", "%v", err)
		} else if s.LabelsSubject == s.PredictionsSubject {
			p.add(sp+".labels_subject", "is the same subject as predictions_subject")
		}
		c.validateSourceAuth(p, sp, s, secrets)
		validateSourceTuning(p, sp, s, c.Ingest.QueueWait)
	}
}

// validateSourceAuth checks that at most one way to authenticate is set,
// and with secrets that its environment variable holds a value.
func (c config) validateSourceAuth(p *problems, sp string, s sourceConfig, secrets bool) {
	ways := 0
	for _, set := range []bool{s.TokenEnv != "", s.User != "" || s.PasswordEnv != "", s.CredentialsFile != ""} {
		if set {
			ways++
		}
	}
	if ways > 1 {
		p.add(sp, "set one of token_env, user with password_env, or credentials_file")
	}
	if (s.User == "") != (s.PasswordEnv == "") {
		p.add(sp+".password_env", "user and password_env go together")
	}
	if secrets && s.TokenEnv != "" && s.token == "" {
		p.add(sp+".token_env", "environment variable %s is not set or empty", s.TokenEnv)
	}
	if secrets && s.PasswordEnv != "" && s.password == "" {
		p.add(sp+".password_env", "environment variable %s is not set or empty", s.PasswordEnv)
	}
	if s.TLS != nil && (s.TLS.CertFile == "") != (s.TLS.KeyFile == "") {
		p.add(sp+".tls", "cert_file and key_file go together")
	}
}

// validateSourceTuning checks the fetch and redelivery settings.
func validateSourceTuning(p *problems, sp string, s sourceConfig, queueWait duration) {
	if s.FetchMessages < 0 {
		p.add(sp+".fetch_messages", "must not be negative (0 means %d)", natsjs.DefaultFetchMessages)
	}
	if s.FetchBytes < 0 {
		p.add(sp+".fetch_bytes", "must not be negative")
	}
	if s.Workers < 0 {
		p.add(sp+".workers", "must not be negative (0 means %d)", natsjs.DefaultWorkers)
	}
	if s.AckWait != 0 && time.Duration(s.AckWait) < time.Second {
		p.add(sp+".ack_wait", "must be at least 1s")
	}
	ackWait := cmp.Or(time.Duration(s.AckWait), natsjs.DefaultAckWait)
	if ackWait <= time.Duration(queueWait) {
		p.add(sp+".ack_wait", "%s must exceed ingest.queue_wait %s, or a message waiting for a slot is redelivered meanwhile",
			windows.FormatDuration(ackWait), windows.FormatDuration(time.Duration(queueWait)))
	}
	if s.NakDelay < 0 {
		p.add(sp+".nak_delay", "must not be negative")
	}
}
