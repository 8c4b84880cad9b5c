// Package alerts evaluates classwatch's alert rules on a schedule, keeps
// each alert's state in the store, and tells Alertmanager or a webhook when
// an alert fires or resolves.
//
// # Overview
//
// A Rule watches one figure of one model (or of every model) over one
// configured window. Rules are statistical: a floor on recall fires only
// when the whole confidence interval of the recall lies below the floor,
// and a drop against a reference period fires only when a one-sided test
// says the fall is larger than the margin beyond chance, so that a small
// sample's wobble pages nobody. The kinds:
//
//   - floor, ceiling: any window metric (per class where it has one)
//     against a threshold. Proportions (recall, precision, specificity,
//     prevalence, predicted_share, accuracy, label_coverage) are judged by
//     their Wilson (or Jeffreys) interval at the rule's confidence; the
//     others (f1, balanced_accuracy, macro_f1, mcc, kappa) have no such
//     interval and need "interval: none", which compares the point value.
//     Label coverage of a matured window below a floor is a floor rule on
//     label_coverage.
//   - drop: per-class recall, precision or specificity lower than in a
//     reference period by more than margin: a one-sided comparison of two
//     proportions at level 1 − confidence (Fisher's exact test; with a
//     margin, Farrington & Manning's score test),
//     Benjamini–Hochberg across the rule's classes of a model.
//   - confusion_rise: the share of actual class A predicted as B rose
//     against the reference by more than margin; the same tests.
//   - prevalence_shift, output_shift: the actual-class (or predicted-class,
//     which needs no labels) distribution against the reference's, by a
//     chi-square or G test of homogeneity (sparse classes pooled) and/or
//     the population stability index.
//   - no_traffic: no prediction from a model has arrived for a duration
//     (the producer or its pipeline is probably broken).
//
// Every figure needs min_count observations (30 unless set) in the current
// period and in the reference; below that the outcome is unknown. The
// reference is another window or a fixed range; buckets it shares with the
// current window are left out of it, so the two samples are disjoint.
//
// # Configuration
//
// The daemon's config holds the rules under "alerts:" and the receivers
// under "notifiers:" (ParseRules, ParseNotifiers; "classwatch rules check
// F" runs CheckFile). Every rule takes name, kind, model (a name or "all"),
// window (not no_traffic), and optionally schedule (cron, UTC; default
// every minute), severity (critical, warning or info; default warning),
// labels, annotations (text/template
// over TemplateData), fire_after, resolve_after (default 1), confidence
// (default: the daemon's) and min_count (default 30). By kind:
//
//	floor, ceiling    metric, threshold, classes, interval (wilson, jeffreys, none)
//	drop              reference, metric (recall, precision, specificity), classes, margin
//	confusion_rise    reference, pairs [{actual, predicted}], margin
//	prevalence_shift  reference, test (chi_square, g_test, none), psi_threshold
//	output_shift      reference, test, psi_threshold
//	no_traffic        quiet_for
//
// A reference is {window: NAME} or {from: RFC 3339, to: RFC 3339}. For
// example:
//
//	alerts:
//	  - name: fraud-recall-drop
//	    kind: drop
//	    model: card-fraud
//	    window: 1d
//	    classes: [fraud]
//	    margin: 0.05
//	    reference: {window: 7d-matured}
//	    severity: critical
//	    fire_after: 2
//	notifiers:
//	  - {name: oncall, type: alertmanager, url: "http://127.0.0.1:9093"}
//	  - {name: audit, type: webhook, url: "https://hooks.example/cw", bearer_token_file: /etc/cw/token}
//
// Notifiers take name, type (alertmanager, webhook), url, bearer_token or
// bearer_token_file, timeout (10s), max_attempts (5), retry_wait (1s,
// doubling), queue_size (1000) and, for alertmanager, resend_interval (1m).
// Unknown keys, keys that do not apply to a rule's kind, and bad values are
// errors naming the key and its line.
//
// Each kind is one entry of the kinds table (kinds.go): its keys, its
// defaults, and a constructor that checks the rule's settings and returns
// the kind's Evaluator. A kind that is not in the table is rejected when
// the rule is parsed (naming the key and line) or compiled, so every
// compiled rule has an evaluator. To add a kind: add its constant and
// fields to rule.go, its entry to the table, and its evaluator in a file
// of its own (kind_*.go).
//
// Rules are evaluated at their cron schedule's times (UTC). Each
// evaluation yields, per alert instance (rule × model × class, or × pair of
// classes), a Result with the value, interval, p-value and reference
// figures, and an outcome: met, clear or unknown.
//
// # State Model
//
//	inactive ──met──► pending ──met × fire_after──► firing
//	    ▲                │clear                       │clear × resolve_after
//	    └────────────────┘◄──────clear──── resolved ◄─┘
//	                                          │met
//	                                          └──► pending (a new episode)
//
// fire_after and resolve_after count consecutive evaluations (hysteresis);
// with fire_after 1 an alert fires at the first evaluation that meets the
// condition. An unknown outcome holds the state and the counters: missing
// data neither fires nor resolves an alert, and neither does a window the
// window source does not know yet. An instance the rule no longer covers (a
// class or pair taken out of its config) counts as clear.
//
// Every change of an instance is saved with Store.SaveAlert before the
// manager acts on it, and every change of state is appended to the
// history. Notifiers hear of two changes: firing and resolved. A notice is
// recorded in the alert's record once its notifier took it (or was given up
// on), so a notice lost in a crash is sent after the restart and one
// already delivered is not sent again.
//
// # Single Evaluator
//
// Several daemons may share one PostgreSQL database; exactly one evaluates.
// At start and at each scheduled time a replica that does not hold the
// store's "alerts" lock (Store.TryLead; a PostgreSQL advisory lock) tries to
// take it, and evaluates only when it holds it. The holder checks the lock
// (Lease.Alive) before each evaluation. Package lease (windows/store/lease)
// keeps the lock; its documentation gives the states and the failure
// handling common to every such lock.
//
//	follower ──TryLead succeeds──► load state from the store ──► leader
//	    ▲                                                          │
//	    └──────── Alive fails (connection lost, lock gone) ────────┘
//
// # Failure Handling
//
//   - The leader dies: its database session ends and PostgreSQL frees the
//     lock; another replica takes it at its next scheduled time, loads the
//     alert state (a firing alert stays firing and is not notified again)
//     and resends the firing alerts to Alertmanager, which keeps them since
//     their end time lay four resend intervals ahead.
//   - The leader loses its connection: Alive fails, the replica drops its
//     in-memory state and becomes a follower until it can take the lock
//     again. A notice it delivers meanwhile is not recorded; the new leader
//     may send it once more.
//   - The store fails during an evaluation: the rule's evaluation fails
//     (classwatch_alert_evaluation_failures_total) and the instance keeps
//     its previous state, in memory and in the store; the next evaluation
//     retries the change.
//   - An evaluation overruns its schedule: cron skips the overlapping run
//     and the next run counts the scheduled times passed over in
//     classwatch_alert_evaluations_missed_total; it evaluates at the latest
//     scheduled time.
//   - A notifier fails: delivery is kept apart from evaluation
//     (delivery.go, queue.go): each notifier has its own bounded queue and
//     worker, so evaluation never waits for it. Each attempt has its own timeout;
//     network errors and 5xx (or 429) answers are retried with a doubling
//     pause; the batch is given up after max_attempts, logged, counted in
//     classwatch_alert_notifications_failed_total and listed under
//     "undelivered" in GET /v1/alerts. A full queue drops its oldest entry
//     (classwatch_alert_notifications_dropped_total). Error messages never
//     contain the notifier's URL path, query, credentials or token.
//   - Shutdown: Stop stops the schedule, waits for a running evaluation,
//     delivers what the queues hold until its context ends, and releases
//     the lock.
package alerts
