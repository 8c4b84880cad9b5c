package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
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
