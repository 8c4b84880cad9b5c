package main

import (
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/windows"
)

// writeConfig writes a config file into a temporary directory.
func writeConfig(t *testing.T, text string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "classwatch.yml")
	if err := os.WriteFile(p, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

// TestRulesCheckMatchesServe checks that "rules check" reads a file as
// serve does: a rule on a model's own window passes (full.yml names
// parcel-inspect's 2h-matured), and a mistake outside the alert sections
// fails, since serve would refuse it.
func TestRulesCheckMatchesServe(t *testing.T) {
	full := filepath.Join("testdata", "config", "full.yml")
	if _, err := loadConfig(configSource{path: full, getenv: fullEnv(), secrets: true}); err != nil {
		t.Fatalf("serve's load of full.yml: %v", err)
	}
	nowhere := writeConfig(t, `models:
  - name: desk-route
    classes: [billing, outage]
    windows: [{name: 30m, length: 30m}]
alerts:
  - {name: outage-floor, kind: floor, model: desk-route, window: 45m, metric: recall, classes: [outage], threshold: 0.8}
`)
	cases := []struct {
		name, file string
		want       int
		text       string
	}{
		{"model window, tokens without secrets", full, 0, "valid"},
		{"bad top-level values", filepath.Join("testdata", "config", "bad_values.yml"), 1, `clock: "sundial" is not event or wall`},
		{"window no model has", nowhere, 1, `window "45m" is not configured`},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			code, out, errOut := runCLI(t, "rules", "check", tc.file)
			if code != tc.want || !strings.Contains(out+errOut, tc.text) {
				t.Errorf("rules check %s = %d\nstdout: %s\nstderr: %s\nwant %d and %q", tc.file, code, out, errOut, tc.want, tc.text)
			}
		})
	}
}

// TestFlagsBeforeValidation checks that a command-line override is applied
// before the one validation: a file whose listen and database the flags
// replace loads.
func TestFlagsBeforeValidation(t *testing.T) {
	p := writeConfig(t, "listen: nowhere\ndatabase: mysql://db/cw\n")
	cfg, err := loadConfig(configSource{path: p, getenv: env(), listen: "127.0.0.1:0", database: "postgres://db/cw", secrets: true})
	if err != nil {
		t.Fatalf("load with overrides: %v", err)
	}
	if cfg.Listen != "127.0.0.1:0" || cfg.Database != "postgres://db/cw" {
		t.Errorf("listen, database = %q, %q", cfg.Listen, cfg.Database)
	}
	if _, err := loadConfig(configSource{path: p, getenv: env(), secrets: true}); err == nil ||
		!strings.Contains(err.Error(), `listen: "nowhere" is not host:port`) || !strings.Contains(err.Error(), `scheme "mysql"`) {
		t.Errorf("load without overrides = %v, want the listen and database errors", err)
	}
}

// TestSecretsOnlyForServing checks that the commands that serve no HTTP
// load a file whose token variables are unset, and serve does not.
func TestSecretsOnlyForServing(t *testing.T) {
	p := filepath.Join("testdata", "config", "full.yml")
	if _, err := loadConfig(configSource{path: p, getenv: env()}); err != nil {
		t.Errorf("load without secrets: %v", err)
	}
	if _, err := loadConfig(configSource{path: p, getenv: env(), secrets: true}); err == nil || !strings.Contains(err.Error(), "CW_TOKEN_CLINIC is not set") {
		t.Errorf("serve's load without secrets = %v, want the missing variable named", err)
	}
}

// TestServerKeys checks the TLS, read-token and start-up keys.
func TestServerKeys(t *testing.T) {
	cases := []struct {
		text string
		env  func(string) string
		want string // "" means valid
	}{
		{"tls: {cert_file: a.crt, key_file: a.key}\nstore_wait: 0s\n", env(), ""},
		{"tls: {cert_file: a.crt}\n", env(), "tls: needs both cert_file and key_file"},
		{"store_wait: -1s\n", env(), "store_wait: must not be negative"},
		{"read: {tokens: [{name: boards, token_env: CW_R}]}\n", env(), "read.tokens[0].token_env: environment variable CW_R is not set"},
		{"read: {tokens: [{name: boards, token_env: CW_R}]}\n", env("CW_R", "r1"), ""},
		{"read: {tokens: [{name: boards, token_env: CW_R, models: [m]}]}\n", env("CW_R", "r1"), "read.tokens[0].models: read tokens may read every model"},
		{"read: {tokens: [{name: a, token_env: CW_R}, {name: a, token_env: CW_S}]}\n", env("CW_R", "r1", "CW_S", "r1"), `token "a" is listed twice`},
		{"read: {tokens: [{name: a, token_env: CW_R}, {name: b, token_env: CW_S}]}\n", env("CW_R", "r1", "CW_S", "r1"), "CW_S holds the same token"},
		{"tls: {cert: a.crt}\n", env(), `unknown key "tls.cert"`},
	}
	for _, tc := range cases {
		cfg, err := parseConfig([]byte(tc.text), configSource{getenv: tc.env, secrets: true})
		switch {
		case tc.want == "" && err != nil:
			t.Errorf("%q: %v", tc.text, err)
		case tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)):
			t.Errorf("%q = %v, want an error with %q", tc.text, err, tc.want)
		case tc.want == "" && strings.Contains(cfg.String(), "r1"):
			t.Errorf("%q: String prints the read token's secret:\n%s", tc.text, cfg)
		}
	}
	if cfg, err := parseConfig(nil, configSource{getenv: env()}); err != nil || time.Duration(cfg.StoreWait) != defaultStoreWait {
		t.Errorf("default store_wait = %v, %v; want %v", cfg.StoreWait, err, defaultStoreWait)
	}
	for listen, want := range map[string]bool{"127.0.0.1:9640": true, "[::1]:9640": true, "localhost:9640": true, "0.0.0.0:9640": false, ":9640": false, "10.1.2.3:9640": false} {
		if got := loopbackOnly(listen); got != want {
			t.Errorf("loopbackOnly(%q) = %v, want %v", listen, got, want)
		}
	}
}

// TestSeriesBudgetWarning checks which configurations can pass the
// /metrics series budget, and that the daemon says so at start.
func TestSeriesBudgetWarning(t *testing.T) {
	cases := []struct {
		text string
		warn bool
	}{
		{"", false},
		{"models: [{name: m, classes: [a, b, c]}]\n", false},
		{"auto_register: true\n", true}, // 100 models × 50 classes × 3 windows
		{"auto_register: true\nmax_models: 3\nmax_classes: 10\n", false},
		{"auto_register: true\nmax_models: 0\n", true},
		{"auto_register: true\nmax_series: 0\n", false},
		{"models: [{name: m, classes: [a, b], auto_register: true, max_classes: 0}]\n", true},
	}
	for _, tc := range cases {
		cfg, err := parseConfig([]byte(tc.text), configSource{getenv: env()})
		if err != nil {
			t.Fatalf("%q: %v", tc.text, err)
		}
		err = windows.CheckScrapeBudget(cfg.scrapeShapes(), cfg.trackerOptions().MaxSeries)
		if (err != nil) != tc.warn {
			t.Errorf("%q: budget check = %v, want a warning: %v", tc.text, err, tc.warn)
		}
	}
	p := startInProcess(t, testConfig(t, "auto_register: true\n", "", nil))
	if !strings.Contains(p.logs.String(), "metrics series budget") {
		t.Errorf("no start-up warning for 100 auto-registered models of 50 classes:\n%s", p.logs)
	}
}

// TestKubernetesExample loads the config of deploy/kubernetes through the
// real loader and checks that, binding every interface, it sets ingest
// tokens, read tokens and TLS (README.md "Security and limits").
func TestKubernetesExample(t *testing.T) {
	f, err := os.Open(filepath.Join("..", "..", "deploy", "kubernetes", "classwatch.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	dec := yaml.NewDecoder(f)
	var text string
	for {
		var doc struct {
			Kind string            `yaml:"kind"`
			Data map[string]string `yaml:"data"`
		}
		if err := dec.Decode(&doc); err != nil {
			break
		}
		if doc.Kind == "ConfigMap" {
			text = doc.Data["classwatch.yml"]
		}
	}
	if text == "" {
		t.Fatal("no ConfigMap with classwatch.yml in the manifest")
	}
	cfg, err := parseConfig([]byte(text), configSource{secrets: true, getenv: func(k string) string { return "example-" + k }})
	if err != nil {
		t.Fatalf("the Kubernetes example's config: %v", err)
	}
	if !loopbackOnly(cfg.Listen) && (len(cfg.Ingest.Tokens) == 0 || len(cfg.Read.Tokens) == 0 || !cfg.TLS.enabled()) {
		t.Errorf("the example listens on %s without ingest tokens, read tokens and TLS", cfg.Listen)
	}
}

// TestREADMEConfigurationKeys checks that README.md's "Configuration"
// section names every key the loader accepts, so a new key cannot go
// undocumented. The alerts, notifiers and sources sections are described
// in sections of their own.
func TestREADMEConfigurationKeys(t *testing.T) {
	readme, err := os.ReadFile(filepath.Join("..", "..", "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	text := string(readme)
	start := strings.Index(text, "\n## Configuration\n")
	if start < 0 {
		t.Fatal(`README.md has no "## Configuration" section`)
	}
	section := text[start+1:]
	if end := strings.Index(section[1:], "\n## "); end >= 0 {
		section = section[:end+1]
	}
	// documented: the key's path or, for a model's key, ".key"; the keys
	// of a list's items may instead appear in a {key, ...} form.
	documented := func(path, key string, item bool) bool {
		if strings.Contains(section, "`"+path+"`") || strings.Contains(section, "`"+path+"[]`") ||
			strings.Contains(section, "`."+key+"`") {
			return true
		}
		return item && regexp.MustCompile(`\{[^}]*\b`+key+`\b[^}]*\}`).MatchString(section)
	}
	var walk func(typ reflect.Type, prefix string, item bool)
	walk = func(typ reflect.Type, prefix string, item bool) {
		for i := range typ.NumField() {
			f := typ.Field(i)
			key, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
			if key == "" || key == "-" {
				continue
			}
			path := prefix + key
			ft := f.Type
			for ft.Kind() == reflect.Pointer {
				ft = ft.Elem()
			}
			switch {
			case ft == reflect.TypeOf(yaml.Node{}):
			case ft.Kind() == reflect.Slice && ft.Elem().Kind() == reflect.Struct:
				if key == "sources" {
					break // its own section, "Stream source (NATS JetStream)"
				}
				walk(ft.Elem(), path+"[].", path != "models")
				continue
			case ft.Kind() == reflect.Struct:
				walk(ft, path+".", false)
				continue
			}
			if !documented(path, key, item) {
				t.Errorf("README.md Configuration lacks %s", path)
			}
		}
	}
	walk(reflect.TypeOf(config{}), "", false)
}
