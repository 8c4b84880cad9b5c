package alerts

import (
	"context"
	"fmt"
	"time"
)

// noTrafficEval evaluates a no_traffic rule from the model's latest
// prediction time. A model that never sent one counts as quiet since the
// evaluator started.
type noTrafficEval struct{ r *Rule }

func newNoTraffic(r *Rule, bad badFunc) Evaluator {
	if r.QuietFor <= 0 {
		bad("quiet_for", "required and positive")
	}
	return &noTrafficEval{r: r}
}

// Evaluate measures the time since the model's latest prediction.
func (e *noTrafficEval) Evaluate(_ context.Context, in Input) ([]Finding, error) {
	since := in.Model.LatestAt
	res := Result{Threshold: ptr(e.r.QuietFor.Seconds())}
	if since.IsZero() {
		since = in.Since
	} else {
		res.LastPrediction = ptr(in.Model.LatestAt)
	}
	quiet := in.At.Sub(since)
	res.Value = ptr(quiet.Seconds())
	res.Outcome = outcome(quiet >= e.r.QuietFor)
	return []Finding{{Model: in.Model.Name, Result: res}}, nil
}

func describeNoTraffic(a *Alert, _ string) string {
	res := a.Result
	limit := time.Duration(deref(res.Threshold) * float64(time.Second))
	quiet := time.Duration(deref(res.Value) * float64(time.Second))
	if res.LastPrediction == nil {
		return fmt.Sprintf("no prediction from %s for %s (none yet); limit %s", a.Model, quiet, limit)
	}
	return fmt.Sprintf("last prediction from %s at %s (%s ago); limit %s", a.Model, res.LastPrediction.Format(time.RFC3339), quiet, limit)
}
