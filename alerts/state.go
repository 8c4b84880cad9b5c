package alerts

import (
	"encoding/json"
	"fmt"
	"maps"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// instance is an alert with the counters of its state machine and what
// each notifier was told. It is what the store keeps, as JSON, in
// AlertRecord.Data.
type instance struct {
	Alert
	// Met and Clear count consecutive evaluations with the condition met
	// (clear); an unknown outcome changes neither.
	Met   int `json:"met_count"`
	Clear int `json:"clear_count"`
	// Notified records, per notifier name, the last notice handed over
	// (delivered, or given up after the last attempt).
	Notified map[string]notice `json:"notified,omitempty"`
}

// notice is what a notifier was told about one episode of an alert.
type notice struct {
	State    State     `json:"state"`
	StartsAt time.Time `json:"starts_at"`
}

// step applies one evaluation's result at time at and reports whether the
// state changed (see Lifecycle.Step).
func (in *instance) step(res Result, at time.Time, fireAfter, resolveAfter int) bool {
	l := Lifecycle{State: in.State, Met: in.Met, Clear: in.Clear, ActiveAt: in.ActiveAt, StartsAt: in.StartsAt, EndsAt: in.EndsAt}
	changed := l.Step(res.Outcome, at, fireAfter, resolveAfter)
	in.State, in.Met, in.Clear, in.ActiveAt, in.StartsAt, in.EndsAt = l.State, l.Met, l.Clear, l.ActiveAt, l.StartsAt, l.EndsAt
	in.Result, in.EvaluatedAt = res, at
	return changed
}

// Lifecycle is one alert instance's place in the state machine, with the
// counters of its hysteresis; the zero value is inactive. The daemon keeps
// one per instance in the store; a backtest steps its own.
type Lifecycle struct {
	State State
	// Met and Clear count consecutive evaluations with the condition met
	// (clear); an unknown outcome changes neither.
	Met, Clear int
	// ActiveAt is the first evaluation of the current episode with the
	// condition met; StartsAt when it fired; EndsAt when it resolved.
	ActiveAt, StartsAt, EndsAt time.Time
}

// Step applies one evaluation's outcome at time at and reports whether the
// state changed.
//
//	inactive ──met──► pending ──met × fire_after──► firing
//	    ▲                │clear                       │clear × resolve_after
//	    └────────────────┘◄──────clear──── resolved ◄─┘
//	                                          │met
//	                                          └──► pending (a new episode)
//
// With fire_after 1 an instance goes from inactive (or resolved) straight
// to firing. An unknown outcome (too little data) holds the state and both
// counters: missing data neither fires nor resolves an alert.
func (l *Lifecycle) Step(o Outcome, at time.Time, fireAfter, resolveAfter int) bool {
	if l.State == "" {
		l.State = StateInactive
	}
	before := l.State
	switch o {
	case OutcomeMet:
		l.Clear = 0
		l.Met++
		switch l.State {
		case StateInactive, StateResolved:
			l.State, l.ActiveAt, l.Met = StatePending, at, 1
		}
		if l.State == StatePending && l.Met >= fireAfter {
			l.State, l.StartsAt, l.EndsAt = StateFiring, at, time.Time{}
		}
	case OutcomeClear:
		l.Met = 0
		switch l.State {
		case StatePending, StateResolved:
			l.State, l.Clear = StateInactive, 0
		case StateFiring:
			l.Clear++
			if l.Clear >= resolveAfter {
				l.State, l.EndsAt, l.Clear = StateResolved, at, 0
			}
		}
	}
	return l.State != before
}

// wanted returns the notice notifiers should have for the instance's
// latest episode: firing while it fires, resolved once a fired episode
// ended, none for an episode that never fired.
func (in *instance) wanted() (notice, bool) {
	switch {
	case in.State == StateFiring:
		return notice{StateFiring, in.StartsAt}, true
	case !in.StartsAt.IsZero() && !in.EndsAt.IsZero():
		return notice{StateResolved, in.StartsAt}, true
	}
	return notice{}, false
}

// owes reports whether the notifier named n still needs a notice: a firing
// alert it has not been told about, or the end of an episode it was told
// was firing (a notifier that never heard of an episode is not sent its
// end).
func (in *instance) owes(n string) bool {
	w, ok := in.wanted()
	if !ok {
		return false
	}
	got := in.Notified[n]
	if w.State == StateFiring {
		return got != w
	}
	return got == notice{StateFiring, w.StartsAt}
}

// notice returns the alert as notifiers are to be told of it now.
func (in *instance) notice() Alert {
	a := in.Alert
	if w, ok := in.wanted(); ok {
		a.State = w.State
	}
	return a
}

// clone returns a copy whose maps may be changed independently.
func (in *instance) clone() *instance {
	c := *in
	c.Notified = maps.Clone(in.Notified)
	return &c
}

// record encodes the instance for the store.
func (in *instance) record() (store.AlertRecord, error) {
	data, err := json.Marshal(in)
	if err != nil {
		return store.AlertRecord{}, fmt.Errorf("encode alert %s: %w", in.Key, err)
	}
	return store.AlertRecord{
		Key: in.Key, Rule: in.Rule, Model: in.Model, Class: in.Class,
		State: string(in.State), Data: data, UpdatedAt: in.EvaluatedAt,
	}, nil
}

// decodeRecord rebuilds an instance from a stored record; the record's own
// columns win over the copies inside Data.
func decodeRecord(rec store.AlertRecord) (*instance, error) {
	var in instance
	if err := json.Unmarshal(rec.Data, &in); err != nil {
		return nil, fmt.Errorf("decode alert %s: %w", rec.Key, err)
	}
	in.Key, in.Rule, in.Model, in.Class, in.State = rec.Key, rec.Rule, rec.Model, rec.Class, State(rec.State)
	return &in, nil
}
