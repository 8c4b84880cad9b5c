package main

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows"
)

// databaseURLEnv overrides the file's database key, so the URL and its
// password can live outside the file.
const databaseURLEnv = "CLASSWATCH_DATABASE_URL"

// sqliteFile is the embedded store's file name under data_dir.
const sqliteFile = "classwatch.db"

// config is the daemon's configuration file. The keys of README.md "Configuration" are a
// public contract; the others are ours. Durations take Go syntax plus "d"
// for days. Zero turns a limit or a job off where noted.
type config struct {
	Listen string `yaml:"listen"`
	// Database is a PostgreSQL URL; empty means SQLite under DataDir.
	Database   string         `yaml:"database"`
	DataDir    string         `yaml:"data_dir"`
	Bucket     duration       `yaml:"bucket"`
	Confidence float64        `yaml:"confidence"`
	Windows    []windowConfig `yaml:"windows"`
	Models     []modelConfig  `yaml:"models"`

	// Clock is "event" (the watermark follows the latest prediction time)
	// or "wall" (it follows the current time).
	Clock string `yaml:"clock"`
	// Refresh is how often the windows re-read their cells from the store,
	// which matters when several replicas ingest; 0 turns it off.
	Refresh duration `yaml:"refresh"`
	// MaintenanceInterval is how often the label-timeout, early-label and
	// retention jobs run.
	MaintenanceInterval duration `yaml:"maintenance_interval"`
	// EarlyLabelTTL, Retention and MaxClasses are the defaults of every
	// model; 0 keeps early labels / raw rows forever, or sets no cap.
	EarlyLabelTTL duration `yaml:"early_label_ttl"`
	Retention     duration `yaml:"retention"`
	MaxClasses    int      `yaml:"max_classes"`
	// AutoRegister registers models that are not configured, with their
	// classes, instead of rejecting their lines, while the store holds
	// fewer than MaxModels (0: no cap).
	AutoRegister bool `yaml:"auto_register"`
	MaxModels    int  `yaml:"max_models"`

	// ExternalURL is how people reach this daemon (e.g.
	// "https://classwatch.internal"); alert notifications link under it.
	// Empty means "http://" + listen.
	ExternalURL string `yaml:"external_url"`

	Ingest ingestConfig `yaml:"ingest"`

	// Alerts and Notifiers belong to the alerts package, which decodes them.
	Alerts    yaml.Node `yaml:"alerts,omitempty"`
	Notifiers yaml.Node `yaml:"notifiers,omitempty"`

	// lines maps key paths ("models[1].default_label") to their line in
	// the file, for validation errors.
	lines map[string]int
}

// windowConfig is one rolling window.
type windowConfig struct {
	Name   string   `yaml:"name"`
	Length duration `yaml:"length"`
	Lag    duration `yaml:"lag,omitempty"`
}

// modelConfig is one configured model. Pointer fields override the
// top-level value when set.
type modelConfig struct {
	Name         string   `yaml:"name"`
	Classes      []string `yaml:"classes"`
	LabelTimeout duration `yaml:"label_timeout,omitempty"`
	DefaultLabel string   `yaml:"default_label,omitempty"`

	Bucket *duration `yaml:"bucket,omitempty"`
	// Windows, when set, replace the top-level list for this model.
	Windows       []windowConfig `yaml:"windows,omitempty"`
	EarlyLabelTTL *duration      `yaml:"early_label_ttl,omitempty"`
	Retention     *duration      `yaml:"retention,omitempty"`
	// AutoRegister registers classes the model does not have yet.
	AutoRegister *bool `yaml:"auto_register,omitempty"`
	MaxClasses   *int  `yaml:"max_classes,omitempty"`
}

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

// defaultConfig returns the configuration an empty file gives.
func defaultConfig() config {
	return config{
		Listen:     "127.0.0.1:9640",
		DataDir:    "./classwatch-data",
		Bucket:     duration(windows.DefaultBucket),
		Confidence: 0.95,
		Windows: []windowConfig{
			{Name: "1h", Length: duration(time.Hour)},
			{Name: "1d", Length: duration(24 * time.Hour)},
			{Name: "7d-matured", Length: duration(168 * time.Hour), Lag: duration(72 * time.Hour)},
		},
		Clock:               "event",
		Refresh:             duration(time.Minute),
		MaintenanceInterval: duration(time.Minute),
		EarlyLabelTTL:       duration(7 * 24 * time.Hour),
		MaxClasses:          50,
		MaxModels:           100,
		Ingest: ingestConfig{
			MaxBodyBytes: collector.DefaultMaxBodyBytes,
			MaxLineBytes: collector.DefaultMaxLineBytes,
			MaxInFlight:  collector.DefaultMaxInFlight,
			QueueWait:    duration(collector.DefaultQueueWait),
			MaxFuture:    duration(collector.DefaultMaxFuture),
			RetryAfter:   duration(collector.DefaultRetryAfter),
			BatchLines:   collector.DefaultBatchLines,
		},
	}
}

// loadConfig reads and checks the file at path; an empty path gives the
// defaults (still subject to the environment).
func loadConfig(path string, getenv func(string) string) (config, error) {
	if path == "" {
		return parseConfig(strings.NewReader(""), getenv)
	}
	f, err := os.Open(path)
	if err != nil {
		return config{}, fmt.Errorf("open config: %w", err)
	}
	defer f.Close()
	cfg, err := parseConfig(f, getenv)
	if err != nil {
		return config{}, fmt.Errorf("config %s: %w", path, err)
	}
	return cfg, nil
}

// parseConfig decodes a configuration over the defaults, strictly (an
// unknown key is an error naming it and its line), applies the environment
// (CLASSWATCH_DATABASE_URL, token secrets) and validates the result.
func parseConfig(r io.Reader, getenv func(string) string) (config, error) {
	data, err := io.ReadAll(r)
	if err != nil {
		return config{}, fmt.Errorf("read config: %w", err)
	}
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

	if v := getenv(databaseURLEnv); v != "" {
		cfg.Database = v
	}
	for i := range cfg.Ingest.Tokens {
		if env := cfg.Ingest.Tokens[i].TokenEnv; env != "" {
			cfg.Ingest.Tokens[i].secret = strings.TrimSpace(getenv(env))
		}
	}
	if err := cfg.validate(); err != nil {
		return config{}, err
	}
	return cfg, nil
}

// validate checks the whole configuration and returns every problem, each
// naming its key path and, when known, its line.
func (c config) validate() error {
	var errs []error
	bad := func(path, format string, args ...any) {
		msg := path + ": " + fmt.Sprintf(format, args...)
		if line, ok := c.lines[path]; ok {
			msg = fmt.Sprintf("line %d: %s", line, msg)
		}
		errs = append(errs, errors.New(msg))
	}

	if _, _, err := net.SplitHostPort(c.Listen); err != nil {
		bad("listen", "%q is not host:port", c.Listen)
	}
	if c.Database == "" && c.DataDir == "" {
		bad("data_dir", "must be set when database is empty (the embedded store lives there)")
	}
	if c.Database != "" {
		if u, err := url.Parse(c.Database); err == nil && u.Scheme != "" && u.Scheme != "postgres" && u.Scheme != "postgresql" {
			bad("database", "scheme %q is not postgres:// or postgresql://", u.Scheme)
		}
	}
	bucket := time.Duration(c.Bucket)
	if err := checkBucket(bucket); err != nil {
		bad("bucket", "%v", err)
	}
	if !(c.Confidence > 0 && c.Confidence < 1) {
		bad("confidence", "%v is not between 0 and 1 (exclusive)", c.Confidence)
	}
	if c.Clock != "event" && c.Clock != "wall" {
		bad("clock", "%q is not event or wall", c.Clock)
	}
	if c.Refresh < 0 {
		bad("refresh", "must not be negative")
	}
	if c.MaintenanceInterval <= 0 {
		bad("maintenance_interval", "must be positive")
	}
	if c.EarlyLabelTTL < 0 {
		bad("early_label_ttl", "must not be negative")
	}
	if c.Retention < 0 {
		bad("retention", "must not be negative")
	}
	if c.MaxClasses < 0 {
		bad("max_classes", "must not be negative")
	}
	if c.MaxModels < 0 {
		bad("max_models", "must not be negative")
	} else if c.MaxModels > 0 && len(c.Models) > c.MaxModels {
		bad("max_models", "%d is less than the %d configured models", c.MaxModels, len(c.Models))
	}
	if checkBucket(bucket) == nil {
		checkWindows(c.Windows, bucket, "windows", bad)
	}

	models := map[string]bool{}
	for i, m := range c.Models {
		p := fmt.Sprintf("models[%d]", i)
		if err := collector.ValidModelName(m.Name); err != nil {
			bad(p+".name", "%v", err)
		} else if models[m.Name] {
			bad(p+".name", "model %q is configured twice", m.Name)
		}
		models[m.Name] = true
		c.validateModel(m, p, bad)
	}

	in := c.Ingest
	if in.MaxBodyBytes <= 0 {
		bad("ingest.max_body_bytes", "must be positive")
	}
	if in.MaxLineBytes <= 0 || in.MaxLineBytes > in.MaxBodyBytes {
		bad("ingest.max_line_bytes", "must be positive and at most max_body_bytes")
	}
	if in.MaxInFlight <= 0 {
		bad("ingest.max_in_flight", "must be positive")
	}
	if in.QueueWait < 0 {
		bad("ingest.queue_wait", "must not be negative")
	}
	if in.MaxFuture < 0 {
		bad("ingest.max_future", "must not be negative (0 means no limit)")
	}
	if time.Duration(in.RetryAfter) < time.Second {
		bad("ingest.retry_after", "must be at least 1s")
	}
	if in.BatchLines <= 0 {
		bad("ingest.batch_lines", "must be positive")
	}
	names, secrets := map[string]bool{}, map[string]bool{}
	for i, t := range in.Tokens {
		p := fmt.Sprintf("ingest.tokens[%d]", i)
		switch {
		case t.Name == "":
			bad(p+".name", "is required")
		case names[t.Name]:
			bad(p+".name", "token %q is listed twice", t.Name)
		}
		names[t.Name] = true
		switch {
		case t.TokenEnv == "":
			bad(p+".token_env", "is required: name the environment variable that holds the token")
		case t.secret == "":
			bad(p+".token_env", "environment variable %s is not set or empty", t.TokenEnv)
		case secrets[t.secret]:
			bad(p+".token_env", "environment variable %s holds the same token as another entry", t.TokenEnv)
		}
		secrets[t.secret] = true
		for j, m := range t.Models {
			if !models[m] && !c.AutoRegister {
				bad(fmt.Sprintf("%s.models[%d]", p, j), "%q is not a configured model", m)
			}
		}
	}
	return errors.Join(errs...)
}

func (c config) validateModel(m modelConfig, p string, bad func(path, format string, args ...any)) {
	seen := map[string]bool{}
	for j, cl := range m.Classes {
		cp := fmt.Sprintf("%s.classes[%d]", p, j)
		if err := collector.ValidClassName(cl); err != nil {
			bad(cp, "%v", err)
		} else if seen[cl] {
			bad(cp, "class %q is listed twice", cl)
		}
		seen[cl] = true
	}
	autoRegister := m.AutoRegister != nil && *m.AutoRegister
	if len(m.Classes) < 2 && !autoRegister {
		bad(p+".classes", "a model needs at least two classes unless it sets auto_register")
	}
	maxClasses := c.MaxClasses
	if m.MaxClasses != nil {
		maxClasses = *m.MaxClasses
		if maxClasses < 0 {
			bad(p+".max_classes", "must not be negative")
		}
	}
	if maxClasses > 0 && len(m.Classes) > maxClasses {
		bad(p+".classes", "%d classes pass max_classes %d", len(m.Classes), maxClasses)
	}
	switch {
	case m.DefaultLabel == "" && m.LabelTimeout != 0:
		bad(p+".default_label", "is required with label_timeout")
	case m.DefaultLabel != "" && m.LabelTimeout == 0:
		bad(p+".label_timeout", "is required with default_label")
	case m.LabelTimeout < 0:
		bad(p+".label_timeout", "must be positive")
	case m.DefaultLabel != "" && !slices.Contains(m.Classes, m.DefaultLabel):
		bad(p+".default_label", "%q is not one of the classes", m.DefaultLabel)
	}
	if m.EarlyLabelTTL != nil && *m.EarlyLabelTTL < 0 {
		bad(p+".early_label_ttl", "must not be negative")
	}
	retention := c.Retention
	if m.Retention != nil {
		retention = *m.Retention
		if retention < 0 {
			bad(p+".retention", "must not be negative")
		}
	}
	if retention > 0 && m.LabelTimeout > 0 && retention <= m.LabelTimeout {
		key := p + ".retention"
		if m.Retention == nil {
			key = "retention"
		}
		bad(key, "%s must exceed %s.label_timeout %s, or predictions are purged before their default label applies",
			windows.FormatDuration(time.Duration(retention)), p, windows.FormatDuration(time.Duration(m.LabelTimeout)))
	}
	bucket := time.Duration(c.Bucket)
	if m.Bucket != nil {
		bucket = time.Duration(*m.Bucket)
		if err := checkBucket(bucket); err != nil {
			bad(p+".bucket", "%v", err)
			return
		}
	}
	if m.Windows != nil {
		if len(m.Windows) == 0 {
			bad(p+".windows", "lists no window; leave the key out to use the top-level windows")
		}
		checkWindows(m.Windows, bucket, p+".windows", bad)
	} else if m.Bucket != nil {
		// The top-level windows must fit this model's bucket too.
		for i, w := range c.Windows {
			if err := w.window().Validate(bucket); err != nil {
				bad(p+".bucket", "does not fit windows[%d]: %v", i, err)
			}
		}
	}
}

// checkBucket accepts buckets that tile a UTC day (a divisor of 24h) or are
// whole days, so that bucket bounds fall on day boundaries.
func checkBucket(b time.Duration) error {
	const day = 24 * time.Hour
	switch {
	case b <= 0:
		return errors.New("must be positive")
	case b < time.Second || b%time.Second != 0:
		return fmt.Errorf("%s is not a whole number of seconds", b)
	case day%b != 0 && b%day != 0:
		return fmt.Errorf("%s neither divides a day nor is a whole number of days", windows.FormatDuration(b))
	}
	return nil
}

func checkWindows(ws []windowConfig, bucket time.Duration, p string, bad func(path, format string, args ...any)) {
	seen := map[string]bool{}
	for i, w := range ws {
		wp := fmt.Sprintf("%s[%d]", p, i)
		if err := w.window().Validate(bucket); err != nil {
			bad(wp, "%v", err)
		}
		if w.Name != "" && seen[w.Name] {
			bad(wp+".name", "window %q is listed twice", w.Name)
		}
		seen[w.Name] = true
	}
}

func (w windowConfig) window() windows.Window {
	return windows.Window{Name: w.Name, Length: time.Duration(w.Length), Lag: time.Duration(w.Lag)}
}

// sqlitePath is the embedded store's file.
func (c config) sqlitePath() string { return filepath.Join(c.DataDir, sqliteFile) }

// modelWindows returns the bucket and windows of a model: its overrides,
// else the top-level values (also for models that are not configured).
func (c config) modelWindows(model string) (time.Duration, []windows.Window) {
	bucket, ws := time.Duration(c.Bucket), c.Windows
	for _, m := range c.Models {
		if m.Name != model {
			continue
		}
		if m.Bucket != nil {
			bucket = time.Duration(*m.Bucket)
		}
		if m.Windows != nil {
			ws = m.Windows
		}
	}
	out := make([]windows.Window, len(ws))
	for i, w := range ws {
		out[i] = w.window()
	}
	return bucket, out
}

// allWindows returns every window any model uses, each name once: the
// top-level list, then models' own windows (names are validated unique per
// list; a model may reuse a top-level name for a window of its own).
func (c config) allWindows() []windows.Window {
	_, out := c.modelWindows("")
	seen := map[string]bool{}
	for _, w := range out {
		seen[w.Name] = true
	}
	for _, m := range c.Models {
		for _, w := range m.Windows {
			if !seen[w.Name] {
				seen[w.Name] = true
				out = append(out, w.window())
			}
		}
	}
	return out
}

// trackerOptions maps the configuration onto windows.TrackerOptions. The
// caller adds Store and Now.
func (c config) trackerOptions() windows.TrackerOptions {
	opts := windows.TrackerOptions{
		DefaultBucket: time.Duration(c.Bucket),
		Clock:         windows.Clock(c.Clock),
	}
	_, opts.DefaultWindows = c.modelWindows("")
	for _, m := range c.Models {
		bucket, ws := c.modelWindows(m.Name)
		opts.Models = append(opts.Models, windows.ModelOptions{Name: m.Name, Bucket: bucket, Windows: ws})
	}
	return opts
}

// collectorOptions maps the configuration onto collector.Options: model
// policies, the defaults for models that are not configured, tokens and
// limits. The caller adds Store, Registerer, Logger, Now and the hooks.
func (c config) collectorOptions() collector.Options {
	opts := collector.Options{
		Defaults: collector.ModelPolicy{
			Bucket:        time.Duration(c.Bucket),
			EarlyLabelTTL: time.Duration(c.EarlyLabelTTL),
			Retention:     time.Duration(c.Retention),
			AutoRegister:  c.AutoRegister,
			MaxClasses:    c.MaxClasses,
		},
		AutoRegisterModels: c.AutoRegister,
		MaxModels:          c.MaxModels,
		Limits: collector.Limits{
			MaxBodyBytes: int64(c.Ingest.MaxBodyBytes),
			MaxLineBytes: int(c.Ingest.MaxLineBytes),
			MaxInFlight:  c.Ingest.MaxInFlight,
			QueueWait:    time.Duration(c.Ingest.QueueWait),
			MaxFuture:    time.Duration(c.Ingest.MaxFuture),
			RetryAfter:   time.Duration(c.Ingest.RetryAfter),
		},
	}
	if c.Ingest.MaxFuture == 0 {
		opts.Limits.MaxFuture = -1 // no limit
	}
	for _, m := range c.Models {
		bucket, _ := c.modelWindows(m.Name)
		p := collector.ModelPolicy{
			Name:          m.Name,
			Classes:       slices.Clone(m.Classes),
			Bucket:        bucket,
			LabelTimeout:  time.Duration(m.LabelTimeout),
			DefaultLabel:  m.DefaultLabel,
			EarlyLabelTTL: time.Duration(c.EarlyLabelTTL),
			Retention:     time.Duration(c.Retention),
			MaxClasses:    c.MaxClasses,
		}
		if m.EarlyLabelTTL != nil {
			p.EarlyLabelTTL = time.Duration(*m.EarlyLabelTTL)
		}
		if m.Retention != nil {
			p.Retention = time.Duration(*m.Retention)
		}
		if m.AutoRegister != nil {
			p.AutoRegister = *m.AutoRegister
		}
		if m.MaxClasses != nil {
			p.MaxClasses = *m.MaxClasses
		}
		opts.Models = append(opts.Models, p)
	}
	for _, t := range c.Ingest.Tokens {
		opts.Tokens = append(opts.Tokens, collector.Token{Name: t.Name, Secret: t.secret, Models: slices.Clone(t.Models)})
	}
	return opts
}

// String prints the configuration as YAML with the database password
// hidden; token secrets are never part of it. The alerts and notifiers
// sections are left out: they may hold webhook credentials, and the alerts
// package describes its own.
func (c config) String() string {
	r := c
	r.Database = redactDatabase(c.Database)
	r.Alerts, r.Notifiers = yaml.Node{}, yaml.Node{}
	out, err := yaml.Marshal(r)
	if err != nil {
		return fmt.Sprintf("<config: %v>", err)
	}
	return string(out)
}

// GoString is String, so that %#v does not print secrets either.
func (c config) GoString() string { return c.String() }

// LogValue gives slog the settings an operator looks for at start-up.
func (c config) LogValue() slog.Value {
	models := make([]string, len(c.Models))
	for i, m := range c.Models {
		models[i] = m.Name
	}
	store := "sqlite " + c.sqlitePath()
	if c.Database != "" {
		store = redactDatabase(c.Database)
	}
	return slog.GroupValue(
		slog.String("listen", c.Listen),
		slog.String("store", store),
		slog.String("bucket", windows.FormatDuration(time.Duration(c.Bucket))),
		slog.String("clock", c.Clock),
		slog.Any("models", models),
		slog.Int("windows", len(c.Windows)),
		slog.Int("tokens", len(c.Ingest.Tokens)),
		slog.Bool("auto_register", c.AutoRegister),
	)
}

// redactDatabase hides the password of a database URL or connection string.
func redactDatabase(s string) string {
	if s == "" {
		return ""
	}
	u, err := url.Parse(s)
	if err != nil || u.Scheme == "" {
		// A keyword/value connection string: too many quoting forms to cut
		// out safely, so hide all of it when it carries a password.
		if strings.Contains(strings.ToLower(s), "password") {
			return "<connection string hidden: it holds a password>"
		}
		return s
	}
	if q := u.Query(); q.Has("password") {
		q.Set("password", "xxxxx")
		u.RawQuery = q.Encode()
	}
	return u.Redacted()
}

// duration is a time.Duration in YAML: Go syntax plus "d" for days. A bad
// value is reported with its line and column, which parseConfig turns into
// the key's path.
type duration time.Duration

// UnmarshalYAML parses a duration scalar.
func (d *duration) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return valueError(n, "expected a duration such as 90m, 24h or 7d")
	}
	v, err := windows.ParseDuration(n.Value)
	if err != nil {
		return valueError(n, fmt.Sprintf("%q is not a duration (use Go syntax such as 90m or 1h30m, or days such as 7d)", n.Value))
	}
	*d = duration(v)
	return nil
}

// MarshalYAML prints the duration the way it is read.
func (d duration) MarshalYAML() (any, error) { return windows.FormatDuration(time.Duration(d)), nil }

// byteSize is a size in bytes: an integer, or a number with a unit B, KB,
// MB, GB (powers of 1000) or KiB, MiB, GiB (powers of 1024).
type byteSize int64

// UnmarshalYAML parses a size scalar.
func (b *byteSize) UnmarshalYAML(n *yaml.Node) error {
	v, err := parseByteSize(n.Value)
	if n.Kind != yaml.ScalarNode || err != nil {
		return valueError(n, fmt.Sprintf("%q is not a size (use bytes, or units such as 256KiB or 16MiB)", n.Value))
	}
	*b = byteSize(v)
	return nil
}

func parseByteSize(s string) (int64, error) {
	s = strings.TrimSpace(s)
	i := strings.IndexFunc(s, func(r rune) bool { return (r < '0' || r > '9') && r != '.' })
	num, unit := s, ""
	if i >= 0 {
		num, unit = s[:i], strings.TrimSpace(s[i:])
	}
	mult := map[string]float64{
		"": 1, "B": 1,
		"KB": 1e3, "MB": 1e6, "GB": 1e9,
		"KiB": 1 << 10, "MiB": 1 << 20, "GiB": 1 << 30,
	}[unit]
	v, err := strconv.ParseFloat(num, 64)
	if err != nil || mult == 0 || v < 0 || v*mult > 1<<50 {
		return 0, fmt.Errorf("invalid size %q", s)
	}
	return int64(v * mult), nil
}

// valueError reports a bad scalar in the form indexNodes.describe reads
// back: collected by yaml.v3 together with its other type errors.
func valueError(n *yaml.Node, msg string) error {
	return &yaml.TypeError{Errors: []string{fmt.Sprintf("line %d: column %d: %s", n.Line, n.Column, msg)}}
}

// nodeIndex locates the key paths of a parsed file.
type nodeIndex struct {
	// lines maps a key path to the line of its key (or sequence item).
	lines map[string]int
	// keys lists, per line, the paths of the mapping keys on that line.
	keys map[int][]string
	// values maps "line:column" of a value node to its key path.
	values map[string]string
}

func indexNodes(root *yaml.Node) nodeIndex {
	idx := nodeIndex{lines: map[string]int{}, keys: map[int][]string{}, values: map[string]string{}}
	var walk func(n *yaml.Node, path string)
	walk = func(n *yaml.Node, path string) {
		switch n.Kind {
		case yaml.DocumentNode:
			for _, c := range n.Content {
				walk(c, path)
			}
		case yaml.MappingNode:
			for i := 0; i+1 < len(n.Content); i += 2 {
				k, v := n.Content[i], n.Content[i+1]
				p := k.Value
				if path != "" {
					p = path + "." + k.Value
				}
				idx.lines[p] = k.Line
				idx.keys[k.Line] = append(idx.keys[k.Line], p)
				idx.values[fmt.Sprintf("%d:%d", v.Line, v.Column)] = p
				walk(v, p)
			}
		case yaml.SequenceNode:
			for i, c := range n.Content {
				p := fmt.Sprintf("%s[%d]", path, i)
				idx.lines[p] = c.Line
				idx.values[fmt.Sprintf("%d:%d", c.Line, c.Column)] = p
				walk(c, p)
			}
		}
	}
	walk(root, "")
	return idx
}

// describe rewrites yaml.v3's decoding errors to name the key path.
func (idx nodeIndex) describe(err error) error {
	var te *yaml.TypeError
	if !errors.As(err, &te) {
		return fmt.Errorf("parse config: %w", err)
	}
	msgs := make([]string, 0, len(te.Errors))
	for _, e := range te.Errors {
		msgs = append(msgs, idx.describeOne(e))
	}
	return errors.New(strings.Join(msgs, "\n"))
}

func (idx nodeIndex) describeOne(e string) string {
	// The forms of yaml.v3's messages, and of valueError's.
	unknownFieldRE := regexp.MustCompile(`^line (\d+): field (.+) not found in type \S+$`)
	valueErrorRE := regexp.MustCompile(`^line (\d+): column (\d+): (.*)$`)
	typeErrorRE := regexp.MustCompile("^line (\\d+): cannot unmarshal !!(\\w+)(?: `(.*)`)? into (\\S+)$")
	if m := unknownFieldRE.FindStringSubmatch(e); m != nil {
		line, _ := strconv.Atoi(m[1])
		key := m[2]
		for _, p := range idx.keys[line] {
			if p == key || strings.HasSuffix(p, "."+key) {
				key = p
				break
			}
		}
		return fmt.Sprintf("line %s: unknown key %q", m[1], key)
	}
	if m := valueErrorRE.FindStringSubmatch(e); m != nil {
		if p, ok := idx.values[m[1]+":"+m[2]]; ok {
			return fmt.Sprintf("line %s: %s: %s", m[1], p, m[3])
		}
		return fmt.Sprintf("line %s: %s", m[1], m[3])
	}
	if m := typeErrorRE.FindStringSubmatch(e); m != nil {
		want := map[string]string{"float64": "a number", "int": "an integer", "bool": "true or false", "string": "a string", "[]string": "a list of strings"}[m[4]]
		if want == "" {
			if strings.HasPrefix(m[4], "[]") {
				want = "a list"
			} else {
				want = "a mapping"
			}
		}
		got := m[3]
		if m[2] == "map" || m[2] == "seq" {
			got = map[string]string{"map": "a mapping", "seq": "a list"}[m[2]]
		} else {
			got = strconv.Quote(got)
		}
		line, _ := strconv.Atoi(m[1])
		return fmt.Sprintf("line %s: %s%s is not %s", m[1], idx.pathOnLine(line), got, want)
	}
	return e
}

// pathOnLine names the key whose value sits on line, when only one does.
func (idx nodeIndex) pathOnLine(line int) string {
	var found []string
	prefix := strconv.Itoa(line) + ":"
	for pos, p := range idx.values {
		if strings.HasPrefix(pos, prefix) {
			found = append(found, p)
		}
	}
	if len(found) == 1 {
		return found[0] + ": "
	}
	return ""
}
