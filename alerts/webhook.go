package alerts

import (
	"context"
	"encoding/json"
	"fmt"
	"time"
)

// WebhookVersion is the version of the webhook payload; a change that
// removes or redefines a field gets a new version.
const WebhookVersion = "1"

// Webhook posts alerts as classwatch's own JSON document:
//
//	{"version": "1", "sent_at": "2026-03-01T12:00:05Z", "alerts": [Alert, ...]}
//
// where each alert is encoded as GET /v1/alerts shows it (key, rule, kind,
// model, class, state, labels, annotations, starts_at, ends_at, result
// with value, interval, p_value and reference figures, ...).
type Webhook struct {
	post poster
	now  func() time.Time
}

var _ Notifier = (*Webhook)(nil)

// WebhookPayload is the body a webhook receives.
type WebhookPayload struct {
	Version string    `json:"version"`
	SentAt  time.Time `json:"sent_at"`
	Alerts  []Alert   `json:"alerts"`
}

// Notify posts alerts in one request.
func (n *Webhook) Notify(ctx context.Context, alerts ...Alert) (bool, error) {
	b, err := json.Marshal(WebhookPayload{Version: WebhookVersion, SentAt: n.now().UTC(), Alerts: alerts})
	if err != nil {
		return false, fmt.Errorf("encode alerts for %s: %w", n.post.where(), err)
	}
	return n.post.post(ctx, b)
}
