package main

import (
	"encoding/json"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// TestAuditHTML backfills the end-to-end fixture and writes the audit
// report of its first period with --format html: one self-contained
// document whose data block holds the same figures as --format json
// (README "Pages and the audit report").
func TestAuditHTML(t *testing.T) {
	fx := loadE2EFixture(t)
	cfg := writeE2EConfig(t, fx, "")
	t.Setenv(databaseURLEnv, "")
	for _, f := range []string{"labels_early.ndjson", "predictions.ndjson", "labels.ndjson"} {
		kind := strings.TrimSuffix(strings.TrimSuffix(f, ".ndjson"), "_early")
		if code, out, errOut := runCLI(t, "ingest", "--config", cfg, "--quiet", kind, filepath.Join(e2eDir, f)); code != 0 {
			t.Fatalf("ingest %s: exit %d\n%s%s", f, code, out, errOut)
		}
	}
	p := fx.Periods[0]
	args := []string{"audit", "--config", cfg, "--model", fx.Model,
		"--from", p.From.Format("2006-01-02T15:04:05Z"), "--to", p.To.Format("2006-01-02T15:04:05Z"), "--as-of", "2100-01-01T00:00:00Z"}
	code, jsonOut, errOut := runCLI(t, append(args, "--format", "json")...)
	if code != 0 {
		t.Fatalf("audit json: exit %d\n%s", code, errOut)
	}
	code, html, errOut := runCLI(t, append(args, "--format", "html")...)
	if code != 0 {
		t.Fatalf("audit html: exit %d\n%s", code, errOut)
	}
	if !strings.HasPrefix(html, "<!doctype html>") || strings.Contains(html, "http://") || strings.Contains(html, "https://") {
		t.Errorf("audit html is not one self-contained document:\n%.400s", html)
	}
	m := regexp.MustCompile(`(?s)<script type="application/json" id="classwatch-report">(.*?)</script>`).FindStringSubmatch(html)
	if m == nil {
		t.Fatal("audit html has no classwatch-report data block")
	}
	var embedded, plain map[string]any
	if err := json.Unmarshal([]byte(m[1]), &embedded); err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal([]byte(jsonOut), &plain); err != nil {
		t.Fatal(err)
	}
	for k, v := range plain {
		a, _ := json.Marshal(v)
		b, _ := json.Marshal(embedded[k])
		if string(a) != string(b) {
			t.Errorf("data block %q = %s, --format json says %s", k, b, a)
		}
	}
	if fp, _ := embedded["fingerprint"].(string); len(fp) != 64 || !strings.Contains(html, "sha256:"+fp) {
		t.Errorf("fingerprint %q not shown", fp)
	}
}
