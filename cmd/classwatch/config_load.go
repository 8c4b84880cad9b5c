package main

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"net"
	"net/url"
	"os"
	"time"

	"gopkg.in/yaml.v3"
)

// configSource says where a configuration comes from. Every command loads
// its configuration through loadConfig, so "serve", "rules check" and the
// store commands read and check the same file the same way.
type configSource struct {
	// path is the YAML file; empty means the defaults.
	path string
	// getenv reads the environment (os.Getenv outside tests).
	getenv func(string) string
	// listen and database are command-line overrides; empty keeps the
	// value of the file and the environment.
	listen, database string
	// secrets says the command serves HTTP and so needs every ingest
	// token's secret from the environment; commands that do not ("rules
	// check", "migrate", ...) check the token list without them.
	secrets bool
}

// loadConfig reads the file, applies the environment and the flags, and
// only then validates the result, once.
func loadConfig(src configSource) (config, error) {
	var data []byte
	if src.path != "" {
		var err error
		if data, err = os.ReadFile(src.path); err != nil {
			return config{}, fmt.Errorf("open config: %w", err)
		}
	}
	cfg, err := parseConfig(data, src)
	if err != nil && src.path != "" {
		return config{}, fmt.Errorf("config %s: %w", src.path, err)
	}
	return cfg, err
}

// parseConfig decodes a configuration over the defaults, strictly (an
// unknown key is an error naming it and its line), applies the environment
// (CLASSWATCH_DATABASE_URL, token secrets) and the overrides of src, parses
// the alert sections and validates the result.
func parseConfig(data []byte, src configSource) (config, error) {
	cfg, err := decodeConfig(data)
	if err != nil {
		return config{}, err
	}
	getenv := src.getenv
	if getenv == nil {
		getenv = os.Getenv
	}
	if v := getenv(databaseURLEnv); v != "" {
		cfg.Database = v
	}
	cfg.applySourceDefaults()
	if src.secrets {
		cfg.Ingest.applyEnv(getenv)
		cfg.applySourceEnv(getenv)
		applyTokenEnv(cfg.Read.Tokens, getenv)
	}
	if src.listen != "" {
		cfg.Listen = src.listen
	}
	if src.database != "" {
		cfg.Database = src.database
	}
	alertErr := cfg.parseAlerts()
	if err := errors.Join(cfg.validate(src.secrets), alertErr); err != nil {
		return config{}, err
	}
	return cfg, nil
}

// decodeConfig decodes one YAML document over the defaults, rejecting
// unknown keys, and indexes the lines of its keys.
func decodeConfig(data []byte) (config, error) {
	cfg := defaultConfig()
	var root yaml.Node
	if err := yaml.Unmarshal(data, &root); err != nil {
		return config{}, fmt.Errorf("parse config: %w", err)
	}
	idx := indexNodes(&root)
	cfg.lines = idx.lines

	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	switch err := dec.Decode(&cfg); {
	case errors.Is(err, io.EOF): // an empty file: the defaults
	case err != nil:
		return config{}, idx.describe(err)
	default:
		var extra yaml.Node
		if err := dec.Decode(&extra); !errors.Is(err, io.EOF) {
			return config{}, errors.New("config holds more than one YAML document")
		}
	}
	return cfg, nil
}

// problems collects validation errors, each naming its key path and, when
// the file has the key, its line.
type problems struct {
	lines map[string]int
	errs  []error
}

// add records a problem with the key at path.
func (p *problems) add(path, format string, args ...any) {
	msg := path + ": " + fmt.Sprintf(format, args...)
	if line, ok := p.lines[path]; ok {
		msg = fmt.Sprintf("line %d: %s", line, msg)
	}
	p.errs = append(p.errs, errors.New(msg))
}

// validate checks the whole configuration and returns every problem. With
// secrets, each ingest token's secret must have come from the environment.
func (c config) validate(secrets bool) error {
	p := &problems{lines: c.lines}
	c.validateTop(p)
	bucket := time.Duration(c.Bucket)
	if checkBucket(bucket) == nil {
		checkWindows(p, c.Windows, bucket, "windows")
	}
	models := c.validateModels(p)
	c.Ingest.validate(p)
	c.validateTokens(p, models, secrets)
	c.validateSources(p, secrets)
	c.validateServer(p, secrets)
	c.validateRuleWindows(p)
	return errors.Join(p.errs...)
}

// validateTop checks the top-level scalars.
func (c config) validateTop(p *problems) {
	if _, _, err := net.SplitHostPort(c.Listen); err != nil {
		p.add("listen", "%q is not host:port", c.Listen)
	}
	if c.Database == "" && c.DataDir == "" {
		p.add("data_dir", "must be set when database is empty (the embedded store lives there)")
	}
	if c.Database != "" {
		if u, err := url.Parse(c.Database); err == nil && u.Scheme != "" && u.Scheme != "postgres" && u.Scheme != "postgresql" {
			p.add("database", "scheme %q is not postgres:// or postgresql://", u.Scheme)
		}
	}
	if err := checkBucket(time.Duration(c.Bucket)); err != nil {
		p.add("bucket", "%v", err)
	}
	if !(c.Confidence > 0 && c.Confidence < 1) {
		p.add("confidence", "%v is not between 0 and 1 (exclusive)", c.Confidence)
	}
	if c.Clock != "event" && c.Clock != "wall" {
		p.add("clock", "%q is not event or wall", c.Clock)
	}
	if c.Refresh < 0 {
		p.add("refresh", "must not be negative")
	}
	if c.MaintenanceInterval <= 0 {
		p.add("maintenance_interval", "must be positive")
	}
	if c.EarlyLabelTTL < 0 {
		p.add("early_label_ttl", "must not be negative")
	}
	if c.Retention < 0 {
		p.add("retention", "must not be negative")
	}
	if c.MaxClasses < 0 {
		p.add("max_classes", "must not be negative")
	}
	if c.MaxSeries < 0 {
		p.add("max_series", "must not be negative (0 turns the budget off)")
	}
	if c.MaxModels < 0 {
		p.add("max_models", "must not be negative")
	} else if c.MaxModels > 0 && len(c.Models) > c.MaxModels {
		p.add("max_models", "%d is less than the %d configured models", c.MaxModels, len(c.Models))
	}
}
