package alerts

import (
	"os/exec"
	"testing"
)

// TestPrometheusRules checks the example Prometheus alerting rules in
// deploy/prometheus with promtool, and runs their unit tests, so the
// examples cannot rot as metric names change.
func TestPrometheusRules(t *testing.T) {
	promtool := needBinary(t, "promtool")
	for _, args := range [][]string{
		{"check", "rules", "classwatch-rules.yml"},
		{"test", "rules", "classwatch-rules_test.yml"},
	} {
		cmd := exec.Command(promtool, args...)
		cmd.Dir = "../deploy/prometheus"
		if out, err := cmd.CombinedOutput(); err != nil {
			t.Errorf("promtool %v: %v\n%s", args, err, out)
		}
	}
}
