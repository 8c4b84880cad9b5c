package alerts

import (
	"cmp"
	"encoding/json"
	"fmt"
	"net/http"
	"slices"
	"strconv"
	"time"
)

// Limits of GET /v1/alerts/history.
const (
	defaultHistoryLimit = 100
	maxHistoryLimit     = 10000
)

// Register adds the alert endpoints to mux:
//
//	GET /v1/alerts          alerts that are pending, firing or just resolved,
//	                        and the notifications this replica gave up on
//	GET /v1/alerts/history  state changes, newest first; from and to (RFC 3339)
//	                        bound the change time to [from, to), limit (default
//	                        100, at most 10000) caps the count
//
// Both read the store, so any replica answers with the evaluator's state.
func (m *Manager) Register(mux *http.ServeMux) {
	mux.HandleFunc("GET /v1/alerts", m.handleAlerts)
	mux.HandleFunc("GET /v1/alerts/history", m.handleHistory)
}

// alertsResponse is the body of GET /v1/alerts.
type alertsResponse struct {
	Alerts      []Alert       `json:"alerts"`
	Undelivered []Undelivered `json:"undelivered"`
}

// historyEntry is one state change: the alert as it was, and when.
type historyEntry struct {
	Alert
	UpdatedAt time.Time `json:"updated_at"`
}

func (m *Manager) handleAlerts(w http.ResponseWriter, r *http.Request) {
	recs, err := m.store.Alerts(r.Context())
	if err != nil {
		m.log.Error("read alerts", "err", err)
		writeError(w, http.StatusServiceUnavailable, "alert state unavailable")
		return
	}
	resp := alertsResponse{Alerts: []Alert{}}
	for _, rec := range recs {
		if State(rec.State) == StateInactive {
			continue
		}
		in, err := decodeRecord(rec)
		if err != nil {
			m.log.Error("skip unreadable alert record", "key", rec.Key, "err", err)
			continue
		}
		resp.Alerts = append(resp.Alerts, in.Alert)
	}
	slices.SortFunc(resp.Alerts, func(a, b Alert) int {
		return cmp.Or(cmp.Compare(a.Rule, b.Rule), cmp.Compare(a.Model, b.Model),
			cmp.Compare(a.Class, b.Class), cmp.Compare(a.Predicted, b.Predicted))
	})
	resp.Undelivered = m.delivery.undelivered()
	writeJSON(w, resp)
}

func (m *Manager) handleHistory(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	from, to := time.Unix(0, 0).UTC(), time.Date(9999, 12, 31, 0, 0, 0, 0, time.UTC)
	for _, p := range []struct {
		name string
		t    *time.Time
	}{{"from", &from}, {"to", &to}} {
		if s := q.Get(p.name); s != "" {
			t, err := time.Parse(time.RFC3339, s)
			if err != nil {
				writeError(w, http.StatusBadRequest, fmt.Sprintf("%s: %q is not an RFC 3339 time", p.name, s))
				return
			}
			*p.t = t.UTC()
		}
	}
	if !from.Before(to) {
		writeError(w, http.StatusBadRequest, "from must be before to")
		return
	}
	limit := defaultHistoryLimit
	if s := q.Get("limit"); s != "" {
		n, err := strconv.Atoi(s)
		if err != nil || n < 1 || n > maxHistoryLimit {
			writeError(w, http.StatusBadRequest, fmt.Sprintf("limit: %q is not a whole number from 1 to %d", s, maxHistoryLimit))
			return
		}
		limit = n
	}
	recs, err := m.store.AlertHistory(r.Context(), from, to, limit)
	if err != nil {
		m.log.Error("read alert history", "err", err)
		writeError(w, http.StatusServiceUnavailable, "alert history unavailable")
		return
	}
	out := struct {
		History []historyEntry `json:"history"`
	}{History: []historyEntry{}}
	for _, rec := range recs {
		in, err := decodeRecord(rec)
		if err != nil {
			m.log.Error("skip unreadable alert record", "key", rec.Key, "err", err)
			continue
		}
		out.History = append(out.History, historyEntry{Alert: in.Alert, UpdatedAt: rec.UpdatedAt.UTC()})
	}
	writeJSON(w, out)
}

func writeJSON(w http.ResponseWriter, v any) {
	w.Header().Set("Content-Type", "application/json")
	_ = json.NewEncoder(w).Encode(v)
}

func writeError(w http.ResponseWriter, code int, msg string) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	_ = json.NewEncoder(w).Encode(map[string]string{"error": msg})
}
