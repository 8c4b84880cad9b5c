package main

import (
	"fmt"
	"log/slog"
	"net/url"
	"path/filepath"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows"
)

// The configuration is split by concern: this file holds the top level,
// config_load.go reading and validation, config_models.go models and
// windows, config_ingest.go the push endpoints' limits and tokens,
// config_alerts.go the alert sections, config_server.go TLS, read tokens
// and start-up, config_yaml.go the YAML types and error messages.

// databaseURLEnv overrides the file's database key, so the URL and its
// password can live outside the file.
const databaseURLEnv = "CLASSWATCH_DATABASE_URL"

// sqliteFile is the embedded store's file name under data_dir.
const sqliteFile = "classwatch.db"

// config is the daemon's configuration file. The keys of README.md
// "Configuration" are a public contract; the others are ours. Durations
// take Go syntax plus "d" for days. Zero turns a limit or a job off where
// noted.
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
	// MaxSeries is the series budget of one /metrics scrape of the window
	// families (README.md "Security and limits"); 0 turns it off.
	MaxSeries int `yaml:"max_series"`
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
	// Sources are streams consumed besides HTTP push (config_sources.go).
	Sources []sourceConfig `yaml:"sources,omitempty"`
	// Read guards the read API, the pages and /metrics with tokens.
	Read readConfig `yaml:"read"`
	// TLS turns HTTPS on.
	TLS tlsConfig `yaml:"tls"`
	// StoreWait is how long serve retries an unreachable store at start,
	// answering /readyz with the reason meanwhile; 0 gives up at once.
	StoreWait duration `yaml:"store_wait"`

	// Alerts and Notifiers are decoded by the alerts package into rules
	// and notifiers when the file is loaded.
	Alerts    yaml.Node `yaml:"alerts,omitempty"`
	Notifiers yaml.Node `yaml:"notifiers,omitempty"`

	rules     []alerts.Rule
	notifiers []alerts.NotifierConfig

	// lines maps key paths ("models[1].default_label") to their line in
	// the file, for validation errors.
	lines map[string]int
}

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
		MaxSeries:           windows.DefaultMaxSeries,
		Ingest:              defaultIngest(),
		StoreWait:           duration(defaultStoreWait),
	}
}

// sqlitePath is the embedded store's file.
func (c config) sqlitePath() string { return filepath.Join(c.DataDir, sqliteFile) }

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
		Limits:             c.Ingest.limits(),
		Tokens:             c.Ingest.tokens(),
	}
	for _, m := range c.Models {
		opts.Models = append(opts.Models, c.modelPolicy(m))
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
		slog.Int("rules", len(c.rules)),
		slog.Int("tokens", len(c.Ingest.Tokens)),
		slog.Int("read_tokens", len(c.Read.Tokens)),
		slog.Bool("tls", c.TLS.enabled()),
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
