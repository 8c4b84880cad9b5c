package main

import (
	"encoding/json"
	"fmt"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// TestIngestBackfill loads the end-to-end fixture through "classwatch
// ingest" instead of HTTP and checks the same outcomes: the line-exact
// rejections and counts gen.py derived, and an audit of the result equal
// to scikit-learn's figures (source: scikit-learn 1.2.1 and statsmodels
// 0.13.5 via testdata/e2e/gen.py).
func TestIngestBackfill(t *testing.T) {
	fx := loadE2EFixture(t)
	cfg := writeE2EConfig(t, fx, "")
	t.Setenv(databaseURLEnv, "")
	steps := []struct {
		file string
		want ingestSummary
	}{
		{"labels_early.ndjson", fx.Ingest.LabelsEarly},
		{"predictions.ndjson", fx.Ingest.Predictions},
		{"labels.ndjson", fx.Ingest.Labels},
	}
	for _, s := range steps {
		kind := "labels"
		if strings.HasPrefix(s.file, "predictions") {
			kind = "predictions"
		}
		path := filepath.Join(e2eDir, s.file)
		code, out, errOut := runCLI(t, "ingest", "--config", cfg, "--quiet", kind, path)
		if code != 0 {
			t.Fatalf("ingest %s: exit %d\n%s%s", s.file, code, out, errOut)
		}
		var rejected []string
		for _, l := range s.want.RejectedLines {
			rejected = append(rejected, fmt.Sprintf("%s:%d: ", path, l))
		}
		for _, prefix := range rejected {
			if !strings.Contains(out, prefix) {
				t.Errorf("ingest %s: output does not reject line %q:\n%s", s.file, prefix, out)
			}
		}
		if got := len(regexp.MustCompile(`(?m)^`+regexp.QuoteMeta(path)+`:\d+: `).FindAllString(out, -1)); got != len(rejected) {
			t.Errorf("ingest %s: %d rejected lines printed, want %d", s.file, got, len(rejected))
		}
		summary := fmt.Sprintf("%s: %d accepted, %d duplicates, %d rejected", path, s.want.Accepted, s.want.Duplicates, len(rejected))
		if !strings.Contains(out, summary) {
			t.Errorf("ingest %s: output lacks %q:\n%s", s.file, summary, out)
		}
	}

	if code, out, errOut := runCLI(t, "verify", "--config", cfg); code != 0 {
		t.Fatalf("verify: exit %d\n%s%s", code, out, errOut)
	}
	for _, p := range fx.Periods {
		args := []string{"audit", "--config", cfg, "--model", fx.Model, "--format", "json",
			"--from", p.From.Format("2006-01-02T15:04:05Z"), "--to", p.To.Format("2006-01-02T15:04:05Z")}
		if p.Segment != nil {
			args = append(args, "--segment", *p.Segment)
		}
		if p.AsOf != nil {
			args = append(args, "--as-of", p.AsOf.Format("2006-01-02T15:04:05Z"))
		}
		code, out, errOut := runCLI(t, args...)
		if code != 0 {
			t.Fatalf("audit: exit %d\n%s%s", code, out, errOut)
		}
		var rep matrixReport
		if err := json.Unmarshal([]byte(out), &rep); err != nil {
			t.Fatalf("audit output is not JSON: %v\n%s", err, out)
		}
		where := "audit after ingest " + periodName(p.From, p.To, p.Segment, p.AsOf)
		checkReport(t, where, rep, fx, p.From, p.To, p.Segment, p.AsOf)
		compareFigures(t, where, fx.Classes, rep.figures(), p.figures)
	}
}
