package windows

import (
	"bytes"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
)

// TestReferenceFilesCurrent re-runs testdata/reference/gen.py into a
// temporary folder and compares its output with the committed files. It
// needs Debian's python3 with scikit-learn, scipy and statsmodels, so it runs
// only when CLASSWATCH_CHECK_REFERENCE=1; CI sets that where they exist.
func TestReferenceFilesCurrent(t *testing.T) {
	if os.Getenv("CLASSWATCH_CHECK_REFERENCE") != "1" {
		t.Skip("set CLASSWATCH_CHECK_REFERENCE=1 to regenerate the reference files and compare")
	}
	out := t.TempDir()
	cmd := exec.Command("/usr/bin/python3", "testdata/reference/gen.py", out)
	if msg, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("gen.py: %v\n%s", err, msg)
	}
	for _, name := range []string{"metrics.json", "digits.json", "stats.json"} {
		want, err := os.ReadFile(filepath.Join("testdata/reference", name))
		if err != nil {
			t.Fatal(err)
		}
		got, err := os.ReadFile(filepath.Join(out, name))
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got, want) {
			t.Errorf("%s differs from a fresh gen.py run; regenerate with /usr/bin/python3 windows/testdata/reference/gen.py and review the diff", name)
		}
	}
}
