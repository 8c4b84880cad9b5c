package alerts

import (
	"context"
	"encoding/json"
	"fmt"
	"time"
)

// Alertmanager sends alerts to an Alertmanager through its API v2
// (POST /api/v2/alerts). A firing alert is sent with an end time
// validFor ahead (four resend intervals): the manager resends firing
// alerts every interval, so an Alertmanager that stops hearing from
// classwatch resolves them by itself. A resolved alert is sent with its
// resolution time as end time.
type Alertmanager struct {
	post     poster
	validFor time.Duration
	now      func() time.Time
}

var _ Notifier = (*Alertmanager)(nil)

// postableAlert is one element of the API v2 request body.
type postableAlert struct {
	Labels       map[string]string `json:"labels"`
	Annotations  map[string]string `json:"annotations,omitempty"`
	StartsAt     time.Time         `json:"startsAt"`
	EndsAt       time.Time         `json:"endsAt"`
	GeneratorURL string            `json:"generatorURL,omitempty"`
}

// Notify posts alerts in one request.
func (n *Alertmanager) Notify(ctx context.Context, alerts ...Alert) (bool, error) {
	body := make([]postableAlert, len(alerts))
	now := n.now().UTC()
	for i, a := range alerts {
		end := a.EndsAt
		if a.State == StateFiring || end.IsZero() {
			end = now.Add(n.validFor)
		}
		body[i] = postableAlert{
			Labels: a.Labels, Annotations: a.Annotations,
			StartsAt: a.StartsAt, EndsAt: end, GeneratorURL: a.GeneratorURL,
		}
	}
	b, err := json.Marshal(body)
	if err != nil {
		return false, fmt.Errorf("encode alerts for %s: %w", n.post.where(), err)
	}
	return n.post.post(ctx, b)
}
