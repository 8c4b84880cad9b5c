package pgstore

import (
	"bufio"
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// The crash test's workload: crashBatches iterations, each a prediction
// batch of crashBatchSize lines and then a label batch that labels them and
// sends early labels for the first crashEarly ids of the next batch. A
// fictional clinic's triage model sorts cases into "urgent" and "routine".
const (
	crashBatches   = 400
	crashBatchSize = 40
	crashEarly     = 5
	crashModel     = "clinic-triage"
	envCrashURL    = "CLASSWATCH_CRASH_URL"
	envCrashFrom   = "CLASSWATCH_CRASH_FROM"
)

var crashClasses = []string{"urgent", "routine"}

// crashStart is the first prediction time; the batches cross midnight, so
// children also create day partitions.
var crashStart = time.Date(2026, 3, 2, 23, 0, 0, 0, time.UTC)

func crashID(batch, i int) string { return fmt.Sprintf("case-%d-%d", batch, i) }

func crashPrediction(batch, i int) store.Prediction {
	at := crashStart.Add(time.Duration(batch)*time.Minute + time.Duration(i)*time.Millisecond)
	return store.Prediction{
		Model: crashModel, ID: crashID(batch, i), At: at, Bucket: at.Truncate(5 * time.Minute),
		Predicted: crashClasses[i%2], Segment: "ward",
		Scores: map[string]float64{"urgent": float64(i%10) / 10},
	}
}

// crashActual is the ground truth of prediction i of any batch.
func crashActual(i int) string { return crashClasses[(i/2)%2] }

func crashLabels(batch int) []store.Label {
	base := crashStart.Add(time.Duration(batch)*time.Minute + time.Hour)
	var out []store.Label
	for i := range crashBatchSize {
		out = append(out, store.Label{Model: crashModel, ID: crashID(batch, i), Actual: crashActual(i), At: base})
	}
	for i := range crashEarly {
		// An early version of the next batch's label: same class, earlier
		// at, so the later version keeps the cell where it is.
		out = append(out, store.Label{Model: crashModel, ID: crashID(batch+1, i), Actual: crashActual(i), At: base.Add(30 * time.Minute)})
	}
	return out
}

// TestCrashChild is the child process of TestCrashRecovery; it does nothing
// unless started by it.
func TestCrashChild(t *testing.T) {
	url := os.Getenv(envCrashURL)
	if url == "" {
		t.Skip("run by TestCrashRecovery")
	}
	from, err := strconv.Atoi(os.Getenv(envCrashFrom))
	if err != nil {
		t.Fatalf("%s: %v", envCrashFrom, err)
	}
	ctx := context.Background()
	s, err := Open(ctx, url, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Migrate(ctx); err != nil {
		t.Fatal(err)
	}
	for b := from; b < crashBatches; b++ {
		preds := make([]store.Prediction, crashBatchSize)
		for i := range preds {
			preds[i] = crashPrediction(b, i)
		}
		if _, err := s.IngestPredictions(ctx, preds, crashStart); err != nil {
			t.Fatalf("batch %d predictions: %v", b, err)
		}
		fmt.Printf("ack p %d\n", b)
		if _, err := s.IngestLabels(ctx, crashLabels(b), crashStart); err != nil {
			t.Fatalf("batch %d labels: %v", b, err)
		}
		fmt.Printf("ack l %d\n", b)
	}
}

// TestCrashRecovery kills a child process that ingests numbered batches
// with SIGKILL at random points, starts a new one that resends from the
// first batch not fully acknowledged or a little earlier (so batches that
// did commit are sent twice), and checks at the end that every prediction
// and label version is stored exactly once and every count matches.
func TestCrashRecovery(t *testing.T) {
	if testing.Short() {
		t.Skip("crash test skipped in -short mode")
	}
	url := pgtest.URL(t)
	s, err := Open(t.Context(), url, Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s.Close() })
	if err := s.Migrate(t.Context()); err != nil {
		t.Fatal(err)
	}
	if _, err := s.EnsureModel(t.Context(), crashModel, crashClasses, 0); err != nil {
		t.Fatal(err)
	}

	rng := rand.New(rand.NewPCG(uint64(time.Now().UnixNano()), 1))
	next, kills := 0, 0
	deadline := time.Now().Add(20 * time.Second)
	for next < crashBatches {
		kill := time.Now().Before(deadline)
		acked, done := runCrashChild(t, url, next, kill, time.Duration(50+rng.IntN(400))*time.Millisecond)
		if done {
			break
		}
		// Resend from the first batch not acknowledged, and now and then
		// from one or two acknowledged ones before it, as a client unsure
		// of its last acknowledgements would: those must change nothing.
		next = max(0, acked+1-rng.IntN(3))
		kills++
	}
	t.Logf("%d children killed; last restart from batch %d", kills, next)
	if kills == 0 {
		t.Errorf("no child was killed: the test proved nothing")
	}

	ctx := t.Context()
	var preds, distinct, versions, early int64
	if err := s.pool.QueryRow(ctx, `SELECT count(*), count(DISTINCT id) FROM predictions`).Scan(&preds, &distinct); err != nil {
		t.Fatal(err)
	}
	if err := s.pool.QueryRow(ctx, `SELECT count(*) FROM label_versions`).Scan(&versions); err != nil {
		t.Fatal(err)
	}
	if err := s.pool.QueryRow(ctx, `SELECT count(*) FROM early_labels`).Scan(&early); err != nil {
		t.Fatal(err)
	}
	if want := int64(crashBatches * crashBatchSize); preds != want || distinct != want {
		t.Errorf("predictions stored = %d (%d distinct), want %d", preds, distinct, want)
	}
	// Every prediction has its label; the first crashEarly of every batch
	// but the first also kept their early version.
	if want := int64(crashBatches*crashBatchSize + (crashBatches-1)*crashEarly); versions != want {
		t.Errorf("label versions stored = %d, want %d", versions, want)
	}
	if early != crashEarly {
		t.Errorf("early labels waiting = %d, want %d (those for the batch never sent)", early, crashEarly)
	}

	counts, err := s.Counts(ctx, store.Query{Model: crashModel, From: crashStart.Add(-time.Hour), To: crashStart.Add(24 * time.Hour)})
	if err != nil {
		t.Fatal(err)
	}
	gotCells, wantCells := map[[2]string]int64{}, map[[2]string]int64{}
	gotPred, wantPred := map[string]int64{}, map[string]int64{}
	for _, c := range counts.Cells {
		gotCells[[2]string{c.Actual, c.Predicted}] += c.N
	}
	for _, p := range counts.Predicted {
		gotPred[p.Predicted] += p.N
	}
	for i := range crashBatchSize {
		p := crashPrediction(0, i)
		wantCells[[2]string{crashActual(i), p.Predicted}] += crashBatches
		wantPred[p.Predicted] += crashBatches
	}
	if fmt.Sprint(gotCells) != fmt.Sprint(wantCells) {
		t.Errorf("cells (actual, predicted) = %v, want %v", gotCells, wantCells)
	}
	if fmt.Sprint(gotPred) != fmt.Sprint(wantPred) {
		t.Errorf("predicted counts = %v, want %v", gotPred, wantPred)
	}
	diffs, err := s.Verify(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range diffs {
		t.Errorf("Verify: %+v", d)
	}
}

// runCrashChild runs a child from batch from. With kill, it is killed with
// SIGKILL after wait (unless it finished first). It returns the last batch
// whose predictions and labels were both acknowledged (from−1 if none) and
// whether the child finished every batch.
func runCrashChild(t *testing.T, url string, from int, kill bool, wait time.Duration) (acked int, done bool) {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^TestCrashChild$", "-test.count=1")
	cmd.Env = append(os.Environ(), envCrashURL+"="+url, envCrashFrom+"="+strconv.Itoa(from))
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	var stderr strings.Builder
	cmd.Stderr = &stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	var timer *time.Timer
	if kill {
		timer = time.AfterFunc(wait, func() { _ = cmd.Process.Signal(syscall.SIGKILL) })
		defer timer.Stop()
	}
	acked = from - 1
	var lines []string
	sc := bufio.NewScanner(out)
	for sc.Scan() {
		line := sc.Text()
		lines = append(lines, line)
		var kind string
		var b int
		if n, _ := fmt.Sscanf(line, "ack %s %d", &kind, &b); n == 2 && kind == "l" {
			acked = b
		}
	}
	err = cmd.Wait()
	if err == nil {
		if acked != crashBatches-1 {
			t.Fatalf("child exited cleanly at batch %d; output:\n%s", acked, strings.Join(lines, "\n"))
		}
		return acked, true
	}
	if ws, ok := cmd.ProcessState.Sys().(syscall.WaitStatus); ok && ws.Signaled() && ws.Signal() == syscall.SIGKILL {
		return acked, false
	}
	t.Fatalf("child failed: %v\nstdout:\n%s\nstderr:\n%s", err, strings.Join(lines, "\n"), stderr.String())
	return acked, false
}
