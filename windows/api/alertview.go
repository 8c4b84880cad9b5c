package api

import (
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// alertView is the part of an alert record the pages show. Its fields
// follow the alert JSON of GET /v1/alerts (README "HTTP API"), which the
// store keeps in AlertRecord.Data, so the pages need not import the
// evaluator.
type alertView struct {
	Key       string    `json:"key"`
	Rule      string    `json:"rule"`
	Kind      string    `json:"kind"`
	Model     string    `json:"model"`
	Class     string    `json:"class"`
	Predicted string    `json:"predicted"`
	Window    string    `json:"window"`
	Metric    string    `json:"metric"`
	Severity  string    `json:"severity"`
	State     string    `json:"state"`
	ActiveAt  time.Time `json:"active_at"`
	StartsAt  time.Time `json:"starts_at"`
	EndsAt    time.Time `json:"ends_at"`
	Result    struct {
		From      time.Time   `json:"from"`
		To        time.Time   `json:"to"`
		Value     *float64    `json:"value"`
		Count     int64       `json:"count"`
		Interval  *[2]float64 `json:"interval"`
		Threshold *float64    `json:"threshold"`
		Reference *struct {
			From  time.Time `json:"from"`
			To    time.Time `json:"to"`
			Value *float64  `json:"value"`
			Count int64     `json:"count"`
		} `json:"reference"`
	} `json:"result"`
	// UpdatedAt is the record's time: the state change for history
	// entries.
	UpdatedAt time.Time `json:"-"`
}

// Since is when the alert's current state began: firing since StartsAt,
// pending since ActiveAt.
func (v alertView) Since() time.Time {
	if v.State == "firing" && !v.StartsAt.IsZero() {
		return v.StartsAt
	}
	return v.ActiveAt
}

// Subject names what the alert is about: the class, or the pair of
// classes of a confusion rule.
func (v alertView) Subject() string {
	switch {
	case v.Predicted != "":
		return v.Class + " → " + v.Predicted
	case v.Class != "":
		return v.Class
	}
	return "whole model"
}

// activeAlerts reads the firing and pending alerts, firing first, then the
// longest-standing.
func (a *API) activeAlerts(ctx context.Context) ([]alertView, error) {
	return a.alertStates(ctx, func(rec store.AlertRecord) bool { return rec.State == "firing" || rec.State == "pending" })
}

// alertStates reads the current alert records keep accepts, ordered as
// activeAlerts.
func (a *API) alertStates(ctx context.Context, keep func(store.AlertRecord) bool) ([]alertView, error) {
	recs, err := a.store.Alerts(ctx)
	if err != nil {
		return nil, fmt.Errorf("read alerts: %w", err)
	}
	var out []alertView
	for _, rec := range recs {
		if !keep(rec) {
			continue
		}
		var v alertView
		if err := json.Unmarshal(rec.Data, &v); err != nil {
			a.log.WarnContext(ctx, "pages: skip unreadable alert record", "key", rec.Key, "err", err)
			continue
		}
		v.Key, v.Rule, v.Model, v.Class, v.State, v.UpdatedAt = rec.Key, rec.Rule, rec.Model, rec.Class, rec.State, rec.UpdatedAt
		out = append(out, v)
	}
	slices.SortFunc(out, func(x, y alertView) int {
		return cmp.Or(cmp.Compare(stateRank(x.State), stateRank(y.State)), x.Since().Compare(y.Since()),
			cmp.Compare(x.Model, y.Model), cmp.Compare(x.Key, y.Key))
	})
	return out, nil
}

func stateRank(s string) int {
	if s == "firing" {
		return 0
	}
	return 1
}

// firedRecords decodes the history records of model entering the firing
// state, oldest first (the history comes newest first).
func firedRecords(recs []store.AlertRecord, model string) []alertView {
	var out []alertView
	for _, rec := range recs {
		if rec.Model != model || rec.State != "firing" {
			continue
		}
		var v alertView
		if err := json.Unmarshal(rec.Data, &v); err != nil {
			continue // GET /v1/alerts/history logs the same record
		}
		v.Key, v.Rule, v.Model, v.Class, v.State, v.UpdatedAt = rec.Key, rec.Rule, rec.Model, rec.Class, rec.State, rec.UpdatedAt
		out = append(out, v)
	}
	slices.Reverse(out)
	return out
}
