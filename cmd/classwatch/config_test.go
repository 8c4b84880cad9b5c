package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// env returns a getenv over a fixed map.
func env(kv ...string) func(string) string {
	m := map[string]string{}
	for i := 0; i+1 < len(kv); i += 2 {
		m[kv[i]] = kv[i+1]
	}
	return func(k string) string { return m[k] }
}

func fixture(t *testing.T, name string, getenv func(string) string) (config, error) {
	t.Helper()
	return loadConfig(configSource{path: filepath.Join("testdata", "config", name), getenv: getenv, secrets: true})
}

// fullEnv holds the token secrets full.yml names.
func fullEnv() func(string) string {
	return env("CW_TOKEN_CLINIC", "tok-clinic-s3cret", "CW_TOKEN_BACKFILL", " tok-backfill-s3cret\n")
}

func TestDefaults(t *testing.T) {
	cfg, err := fixture(t, "empty.yml", env())
	if err != nil {
		t.Fatal(err)
	}
	// The contract values of README.md "Configuration".
	if cfg.Listen != "127.0.0.1:9640" || cfg.Database != "" || cfg.DataDir != "./classwatch-data" ||
		cfg.Bucket != duration(5*time.Minute) || cfg.Confidence != 0.95 {
		t.Errorf("defaults = %s", cfg)
	}
	wantWindows := []windowConfig{
		{Name: "1h", Length: duration(time.Hour)},
		{Name: "1d", Length: duration(24 * time.Hour)},
		{Name: "7d-matured", Length: duration(168 * time.Hour), Lag: duration(72 * time.Hour)},
	}
	if !reflect.DeepEqual(cfg.Windows, wantWindows) {
		t.Errorf("default windows = %+v, want %+v", cfg.Windows, wantWindows)
	}
	if cfg.Clock != "event" || len(cfg.Models) != 0 || cfg.AutoRegister {
		t.Errorf("clock, models, auto_register = %q, %d, %v", cfg.Clock, len(cfg.Models), cfg.AutoRegister)
	}
	if got, want := cfg.sqlitePath(), filepath.Join("classwatch-data", "classwatch.db"); got != want {
		t.Errorf("sqlite path = %q, want %q", got, want)
	}
	if err := defaultConfig().validate(true); err != nil {
		t.Errorf("defaultConfig does not validate: %v", err)
	}
	// No file at all gives the same.
	none, err := loadConfig(configSource{getenv: env(), secrets: true})
	if err != nil {
		t.Fatal(err)
	}
	if none.String() != cfg.String() {
		t.Errorf("no file:\n%s\nempty file:\n%s", none, cfg)
	}
}

func TestFullConfig(t *testing.T) {
	cfg, err := fixture(t, "full.yml", fullEnv())
	if err != nil {
		t.Fatal(err)
	}
	days := func(n float64) time.Duration { return time.Duration(n * float64(24*time.Hour)) }
	checks := []struct {
		name      string
		got, want any
	}{
		{"listen", cfg.Listen, "0.0.0.0:9641"},
		{"bucket", time.Duration(cfg.Bucket), 10 * time.Minute},
		{"confidence", cfg.Confidence, 0.9},
		{"clock", cfg.Clock, "wall"},
		{"refresh", time.Duration(cfg.Refresh), 30 * time.Second},
		{"maintenance_interval", time.Duration(cfg.MaintenanceInterval), 2 * time.Minute},
		{"early_label_ttl", time.Duration(cfg.EarlyLabelTTL), days(14)},
		{"retention", time.Duration(cfg.Retention), days(400)},
		{"windows[2].length", time.Duration(cfg.Windows[2].Length), 168 * time.Hour},
		{"windows[2].lag", time.Duration(cfg.Windows[2].Lag), 72 * time.Hour},
		{"max_body_bytes", int64(cfg.Ingest.MaxBodyBytes), int64(8 << 20)},
		{"max_line_bytes", int64(cfg.Ingest.MaxLineBytes), int64(64 << 10)},
		{"token secret", cfg.Ingest.Tokens[0].secret, "tok-clinic-s3cret"},
		{"trimmed token secret", cfg.Ingest.Tokens[1].secret, "tok-backfill-s3cret"},
		{"alerts kind", cfg.Alerts.Kind, yaml.SequenceNode},
		{"notifiers kind", cfg.Notifiers.Kind, yaml.SequenceNode},
	}
	for _, c := range checks {
		if !reflect.DeepEqual(c.got, c.want) {
			t.Errorf("%s = %v, want %v", c.name, c.got, c.want)
		}
	}

	opts := cfg.collectorOptions()
	want := []collector.ModelPolicy{
		{
			Name: "clinic-triage", Classes: []string{"routine", "urgent", "emergency"}, Bucket: 10 * time.Minute,
			LabelTimeout: days(30), DefaultLabel: "routine", EarlyLabelTTL: days(60), Retention: days(400), MaxClasses: 20,
		},
		{
			Name: "parcel-inspect", Classes: []string{"intact", "dented", "torn"}, Bucket: time.Minute,
			EarlyLabelTTL: days(14), Retention: 36 * time.Hour, AutoRegister: true, MaxClasses: 6,
		},
	}
	if !reflect.DeepEqual(opts.Models, want) {
		t.Errorf("model policies =\n%+v\nwant\n%+v", opts.Models, want)
	}
	wantDefaults := collector.ModelPolicy{Bucket: 10 * time.Minute, EarlyLabelTTL: days(14), Retention: days(400), AutoRegister: true, MaxClasses: 20}
	if !opts.AutoRegisterModels || opts.MaxModels != 12 || !reflect.DeepEqual(opts.Defaults, wantDefaults) {
		t.Errorf("defaults = %v %+v, want true %+v", opts.AutoRegisterModels, opts.Defaults, wantDefaults)
	}
	wantLimits := collector.Limits{MaxBodyBytes: 8 << 20, MaxLineBytes: 64 << 10, MaxInFlight: 2, QueueWait: 2 * time.Second, MaxFuture: 5 * time.Minute, RetryAfter: 10 * time.Second,
		MinBodyRate: collector.DefaultMinBodyRate, BodyGrace: collector.DefaultBodyGrace}
	if opts.Limits != wantLimits {
		t.Errorf("limits = %+v, want %+v", opts.Limits, wantLimits)
	}
	if len(opts.Tokens) != 2 || opts.Tokens[0].Secret != "tok-clinic-s3cret" || !reflect.DeepEqual(opts.Tokens[0].Models, []string{"clinic-triage"}) || opts.Tokens[1].Models != nil {
		t.Errorf("tokens = %#v", opts.Tokens)
	}

	bucket, ws := cfg.modelWindows("parcel-inspect")
	wantWs := []windows.Window{{Name: "15m", Length: 15 * time.Minute}, {Name: "2h-matured", Length: time.Hour, Lag: time.Hour}}
	if bucket != time.Minute || !reflect.DeepEqual(ws, wantWs) {
		t.Errorf("parcel-inspect windows = %v %+v", bucket, ws)
	}
	if bucket, ws := cfg.modelWindows("unconfigured-model"); bucket != 10*time.Minute || len(ws) != 3 {
		t.Errorf("other model windows = %v %+v", bucket, ws)
	}

	tr := cfg.trackerOptions()
	if tr.DefaultBucket != 10*time.Minute || tr.Clock != windows.ClockWall || len(tr.DefaultWindows) != 3 || len(tr.Models) != 2 ||
		tr.Models[1].Name != "parcel-inspect" || tr.Models[1].Bucket != time.Minute || !reflect.DeepEqual(tr.Models[1].Windows, wantWs) {
		t.Errorf("tracker options = %+v", tr)
	}

	// The collector accepts the options as they are.
	st, err := sqlitestore.Open(context.Background(), filepath.Join(t.TempDir(), "cw.db"), sqlitestore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	opts.Store, opts.Registerer = st, prometheus.NewRegistry()
	if _, err := collector.New(opts); err != nil {
		t.Errorf("collector.New: %v", err)
	}
}

func TestConfigErrors(t *testing.T) {
	cases := []struct {
		file   string
		getenv func(string) string
		want   []string // each must appear in the error
	}{
		{"unknown_key.yml", env(), []string{`line 3: unknown key "colour"`}},
		{"unknown_nested_key.yml", env(), []string{`line 4: unknown key "models[0].label_timout"`}},
		{"bad_duration.yml", env(), []string{`line 2: bucket: "5 minutes" is not a duration`}},
		{"bad_window_duration.yml", env(), []string{`line 4: windows[1].length: "1week" is not a duration`}},
		{"bad_model_duration.yml", env(), []string{`line 5: models[0].label_timeout: "3600" is not a duration`}},
		{"wrong_type.yml", env(), []string{`line 1: confidence: "high" is not a number`}},
		{"bad_size.yml", env(), []string{`line 2: ingest.max_body_bytes: "16 megabytes" is not a size`}},
		{"bad_bucket.yml", env(), []string{`line 1: bucket: 7m neither divides a day nor is a whole number of days`}},
		{"bad_values.yml", env(), []string{
			`line 1: confidence: 1.5 is not between 0 and 1`,
			`line 2: clock: "sundial" is not event or wall`,
			`line 5: windows[1].name: window "1h" is listed twice`,
			`line 10: models[0].default_label: "fraudulent" is not one of the classes`,
			`line 11: models[1].name: model "card-fraud" is configured twice`,
			`models[1].classes[1]: class "legit" is listed twice`,
			`line 13: models[2].name: model name "loan/default" may only hold`,
		}},
		{"window_not_multiple.yml", env(), []string{`line 6: models[0].bucket: does not fit windows[0]: window 1h: length 1h is not a multiple of the bucket 45m`}},
		{"tokens.yml", env(), []string{`line 4: ingest.tokens[0].token_env: environment variable CW_TOKEN_DESK is not set or empty`}},
		{"tokens.yml", env("CW_TOKEN_DESK", "d"), []string{`ingest.tokens[0].models[1]: "card-fraud" is not a configured model`}},
		{"full.yml", env("CW_TOKEN_CLINIC", "same", "CW_TOKEN_BACKFILL", "same"), []string{`ingest.tokens[1].token_env: environment variable CW_TOKEN_BACKFILL holds the same token`}},
		{"full.yml", env(), []string{`line 45: ingest.tokens[0].token_env: environment variable CW_TOKEN_CLINIC is not set`}},
		{"retention_too_short.yml", env(), []string{`line 1: retention: 30d must exceed models[0].label_timeout 60d`}},
		{"two_documents.yml", env(), []string{"more than one YAML document"}},
	}
	for _, tc := range cases {
		t.Run(tc.file, func(t *testing.T) {
			_, err := fixture(t, tc.file, tc.getenv)
			if err == nil {
				t.Fatal("no error")
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error\n%v\nlacks %q", err, w)
				}
			}
			if strings.Contains(err.Error(), "main.") {
				t.Errorf("error names a Go type: %v", err)
			}
		})
	}
	if _, err := loadConfig(configSource{path: filepath.Join("testdata", "config", "missing.yml"), getenv: env()}); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing file: %v", err)
	}
}

func TestDatabaseFromEnvironment(t *testing.T) {
	cfg, err := fixture(t, "minimal.yml", env(databaseURLEnv, "postgres://watcher:pa55word@db:5432/cw"))
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Database != "postgres://watcher:pa55word@db:5432/cw" {
		t.Errorf("database = %q", cfg.Database)
	}
	if got := time.Duration(cfg.Models[0].LabelTimeout); got != 1440*time.Hour {
		t.Errorf("label_timeout = %v", got)
	}
	full, err := fixture(t, "full.yml", fullEnv())
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(full.Database, "postgres://classwatch:hunter2@") {
		t.Errorf("file database = %q", full.Database)
	}
}

// TestSecretsHidden checks every way a configuration is printed or logged.
func TestSecretsHidden(t *testing.T) {
	for _, db := range []string{
		"postgres://watcher:pa55word@db:5432/cw",
		"postgres://db:5432/cw?user=watcher&password=pa55word",
		"host=db user=watcher password='pa55word x'",
	} {
		cfg, err := fixture(t, "full.yml", func(k string) string {
			if k == databaseURLEnv {
				return db
			}
			return fullEnv()(k)
		})
		if err != nil {
			t.Fatal(err)
		}
		var logged bytes.Buffer
		slog.New(slog.NewJSONHandler(&logged, nil)).Info("config", "config", cfg)
		opts := cfg.collectorOptions()
		outputs := map[string]string{
			"String":       cfg.String(),
			"%v":           fmt.Sprintf("%v", cfg),
			"%+v":          fmt.Sprintf("%+v", cfg),
			"%#v":          fmt.Sprintf("%#v", cfg),
			"tokens %+v":   fmt.Sprintf("%+v", cfg.Ingest.Tokens),
			"tokens %#v":   fmt.Sprintf("%#v", cfg.Ingest.Tokens),
			"options %+v":  fmt.Sprintf("%+v", opts.Tokens),
			"options %#v":  fmt.Sprintf("%#v", opts.Tokens),
			"slog":         logged.String(),
			"notifier url": cfg.String(),
		}
		for name, out := range outputs {
			for _, secret := range []string{"pa55word", "tok-clinic-s3cret", "tok-backfill-s3cret", "key=abc"} {
				if strings.Contains(out, secret) {
					t.Errorf("%s of database %q prints %q:\n%s", name, db, secret, out)
				}
			}
		}
		if !strings.Contains(cfg.String(), "clinic-gateway") {
			t.Errorf("String lacks the token names:\n%s", cfg)
		}
	}
}

// TestStringParsesBack checks that String prints YAML the parser reads back
// to the same configuration (database and alert sections aside).
func TestStringParsesBack(t *testing.T) {
	cfg, err := fixture(t, "full.yml", fullEnv())
	if err != nil {
		t.Fatal(err)
	}
	back, err := parseConfig([]byte(cfg.String()), configSource{getenv: fullEnv(), secrets: true})
	if err != nil {
		t.Fatalf("parse String output: %v\n%s", err, cfg)
	}
	cfg.Database, back.Database = "", ""
	cfg.Alerts, cfg.Notifiers = yaml.Node{}, yaml.Node{}
	cfg.rules, cfg.notifiers = nil, nil
	cfg.lines, back.lines = nil, nil
	if !reflect.DeepEqual(cfg, back) {
		t.Errorf("read back:\n%s\nwant:\n%s", back, cfg)
	}
}

func TestParseByteSize(t *testing.T) {
	cases := map[string]int64{
		"0": 0, "512": 512, "512B": 512, "64KiB": 64 << 10, "1.5MiB": 3 << 19, "2GiB": 2 << 30,
		"16MB": 16_000_000, "1 KB": 1000,
	}
	for in, want := range cases {
		if got, err := parseByteSize(in); err != nil || got != want {
			t.Errorf("parseByteSize(%q) = %d, %v; want %d", in, got, err, want)
		}
	}
	for _, in := range []string{"", "MiB", "-1", "12 parsecs", "1e3", "9999999GiB"} {
		if _, err := parseByteSize(in); err == nil {
			t.Errorf("parseByteSize(%q) succeeded", in)
		}
	}
}

// TestExampleConfig loads the shipped example through the real parser so
// that it cannot rot. Every environment variable it names gets a value.
func TestExampleConfig(t *testing.T) {
	path := filepath.Join("..", "..", "deploy", "classwatch.example.yml")
	if _, err := os.Stat(path); errors.Is(err, fs.ErrNotExist) {
		t.Skip("deploy/classwatch.example.yml not written yet")
	}
	cfg, err := loadConfig(configSource{path: path, secrets: true, getenv: func(k string) string {
		if k == databaseURLEnv {
			return ""
		}
		return "example-secret-" + k
	}})
	if err != nil {
		t.Fatal(err)
	}
	if len(cfg.Models) == 0 {
		t.Errorf("the example configures no model")
	}
}
