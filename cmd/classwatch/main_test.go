package main

import (
	"bytes"
	"context"
	"io"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// runCLI runs the command line in-process and returns its exit status and
// output, as main would.
func runCLI(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var stdout, stderr bytes.Buffer
	err := run(context.Background(), args, &stdout, &stderr)
	return exitCode(err, &stderr), stdout.String(), stderr.String()
}

func TestExitCodes(t *testing.T) {
	bad := filepath.Join(t.TempDir(), "bad.yml")
	if err := os.WriteFile(bad, []byte("alerts:\n  - name: x\n    kind: floor\n    modle: card-screen\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	tests := []struct {
		name     string
		args     []string
		want     int
		wantText string
	}{
		{"no command", nil, 2, "no command given"},
		{"unknown command", []string{"launch"}, 2, `unknown command "launch"`},
		{"help", []string{"help"}, 0, "classwatch serve"},
		{"serve help", []string{"serve", "--help"}, 0, "--listen"},
		{"unknown flag", []string{"verify", "--frobnicate"}, 2, "frobnicate"},
		{"audit needs model", []string{"audit", "--from", "2026-01-01T00:00:00Z"}, 2, "--model, --from and --to are required"},
		{"audit bad time", []string{"audit", "--model", "m", "--from", "yesterday", "--to", "2026-01-01T00:00:00Z"}, 2, "RFC 3339"},
		{"ingest bad kind", []string{"ingest", "scores", "x.ndjson"}, 2, "predictions or labels"},
		{"rules example", []string{"rules", "check", "../../deploy/classwatch.example.yml"}, 0, "rules are valid"},
		{"rules typo", []string{"rules", "check", bad}, 1, "modle"},
		{"missing config", []string{"verify", "--config", filepath.Join(t.TempDir(), "nope.yml")}, 1, "open config"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			code, out, errOut := runCLI(t, tt.args...)
			if code != tt.want {
				t.Errorf("exit status = %d, want %d (stderr %q)", code, tt.want, errOut)
			}
			if !strings.Contains(out+errOut, tt.wantText) {
				t.Errorf("output lacks %q:\nstdout: %s\nstderr: %s", tt.wantText, out, errOut)
			}
		})
	}
}

// TestHelpListsEveryCommand checks that "classwatch --help" shows every
// command with its flags, and that a command without flags shows no empty
// "Flags:" heading.
func TestHelpListsEveryCommand(t *testing.T) {
	code, out, _ := runCLI(t, "--help")
	if code != 0 {
		t.Fatalf("--help exit status %d", code)
	}
	for _, c := range commands() {
		if !strings.Contains(out, "\n"+c.name+": ") {
			t.Errorf("help lacks command %s:\n%s", c.name, out)
		}
	}
	for _, flag := range []string{"-log-json", "-listen", "-seed", "-speed", "-as-of", "-segment", "-format", "-quiet", "-database", "-config"} {
		if !strings.Contains(out, "      "+flag) {
			t.Errorf("help lacks flag %s", flag)
		}
	}
	code, out, errOut := runCLI(t, "rules", "check", "--help")
	if code != 0 || !strings.Contains(errOut, "rules check FILE") || strings.Contains(out+errOut, "Flags:") {
		t.Errorf("rules check --help = %d\nstdout: %s\nstderr: %s", code, out, errOut)
	}
}

// TestREADMEMatchesCLI checks that README.md's "CLI" section names every
// flag of every command, and that the demo's address in README.md is the
// demo's default.
func TestREADMEMatchesCLI(t *testing.T) {
	readme, err := os.ReadFile(filepath.Join("..", "..", "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	text := string(readme)
	start := strings.Index(text, "\n## CLI\n")
	if start < 0 {
		t.Fatal(`README.md has no "## CLI" section`)
	}
	cli := text[start+1:]
	if end := strings.Index(cli[1:], "\n## "); end >= 0 {
		cli = cli[:end+1]
	}
	for _, c := range commands() {
		var usage bytes.Buffer
		_ = c.run(context.Background(), []string{"-h"}, io.Discard, &usage)
		for _, line := range strings.Split(usage.String(), "\n") {
			if !strings.HasPrefix(line, "  -") {
				continue
			}
			flag := "--" + strings.Fields(line)[0][1:]
			if !strings.Contains(cli, "classwatch "+c.name) || !strings.Contains(cli, flag) {
				t.Errorf("README.md CLI section lacks %s %s", c.name, flag)
			}
		}
		if c.name == "demo" {
			m := regexp.MustCompile(`-listen address\n.*\(default "([^"]+)"\)`).FindStringSubmatch(usage.String())
			if m == nil {
				t.Fatalf("demo usage has no --listen default:\n%s", usage.String())
			}
			if want := "`classwatch demo` starts the daemon on `" + m[1] + "`"; !strings.Contains(text, want) {
				t.Errorf("README.md does not say %s", want)
			}
		}
	}
}
