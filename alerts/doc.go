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
//   - estimated_prevalence_shift: early warning without labels. Per class,
//     the prevalence estimated from the window's predicted mix by
//     black-box shift estimation against the reference's labeled matrix
//     (Lipton, Wang & Smola 2018; windows/stats BBSE) differs from the
//     reference's actual prevalence by more than margin: a two-sided z-test
//     of the unclipped estimate minus the reference prevalence, whose
//     variance adds the estimate's delta-method variance (the reference
//     matrix taken as a sample) and the binomial variance of the reference
//     prevalence, Benjamini–Hochberg across the rule's classes. The two
//     rest on the same reference examples and move together, so the sum
//     overstates the variance and the test errs towards silence (the
//     tests measure its false alarms by simulation under pure label
//     shift). It assumes P(predicted | actual) is unchanged (label shift);
//     a model whose errors change too misleads it.
//   - score_shift: early warning without labels. Per class, the histogram
//     of the class's score (10 equal-width bins) in the window against the
//     reference's, by a chi-square or G test of homogeneity (sparse bins
//     pooled), Benjamini–Hochberg across the rule's classes; the figure
//     is the Jensen–Shannon distance (Lin 1991), and threshold, when set,
//     also requires the distance to reach it. Predictions without scores
//     count nowhere.
//   - a ceiling on calibration_error (the expected calibration error of
//     the predicted class's score, README.md "Early warning"), or on
//     brier, is a ceiling rule with interval: none; min_count counts the
//     labeled predictions with scores.
//   - cusum: a Bernoulli CUSUM over the matured buckets of a per-class
//     proportion, tuned to a wanted mean time between false alarms (see
//     "CUSUM" below).
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
// F" runs the daemon's own config loader, which calls them and
// CheckWindows; CheckFile checks the two sections of a file alone). Every
// rule takes name, kind, model (a name or "all"),
// window (except cusum and no_traffic), and optionally schedule (cron,
// UTC; default every minute), severity (critical, warning or info; default
// warning), labels, annotations (text/template over TemplateData),
// fire_after, resolve_after (default 1), confidence (default: the
// daemon's) and min_count (default 30). By kind:
//
//	floor, ceiling    metric, threshold, classes, interval (wilson, jeffreys, none)
//	drop              reference, metric (recall, precision, specificity), classes, margin
//	confusion_rise    reference, pairs [{actual, predicted}], margin
//	prevalence_shift  reference, test (chi_square, g_test, none), psi_threshold
//	output_shift      reference, test, psi_threshold
//	estimated_prevalence_shift  reference, classes, margin
//	score_shift       reference, classes, test (chi_square, g_test, none), threshold
//	cusum             metric (recall, precision, specificity, prevalence; default recall),
//	                  classes, direction (down, up; default down), lag,
//	                  reference or expected, shift, false_alarm_every
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
// # CUSUM
//
// A rule evaluated every hour at a 5% level pages far more often over a
// month than "5%" suggests. A cusum rule states the on-call promise
// directly, as a mean time between false alarms:
//
//	alerts:
//	- name: fraud-recall-cusum
//	  kind: cusum
//	  model: card-screen
//	  metric: recall                     # recall, precision, specificity or prevalence
//	  classes: [fraud]
//	  direction: down                    # down (default) or up
//	  lag: 72h                           # a bucket counts once it is this old
//	  reference: {window: 30d-matured}   # in-control p0 from this period; or expected: 0.9
//	  shift: 0.2                         # p1 = p0 − shift (down) or p0 + shift (up)
//	  false_alarm_every: 90d             # wanted mean time between false alarms
//
// At each evaluation, for each class, the rule reads the stored cells of
// the matured buckets, those whose start lies in [W − lag − 7d, W − lag)
// where W is the model's watermark (README.md "Join semantics and
// windows"), and turns each bucket into trials and successes of the
// metric (README.md "Metric definitions": for recall of k, the labeled
// examples of actual k and those predicted k). It then runs Page's (1954)
// CUSUM from 0 over the buckets in prediction-time order, each bucket's
// trials entering at once:
//
//	S ← max(0, S + bad·ln(q1/q0) + good·ln((1−q1)/(1−q0)))
//
// where bad counts the outcomes p1 makes likelier (failures when watching
// for a drop, successes when watching for a rise), good the others, and
// q0, q1 the probability of a bad outcome under p0 and p1. The two weights
// are rounded to integer multiples of one step (their ratio within 1%),
// and that integer chart is the one run and reported (DesignCUSUM).
//
// The threshold h follows from false_alarm_every and the observed trial
// rate: with λ trials an hour over the chart's buckets, h is the smallest
// threshold whose in-control average run length, trial by trial, is at
// least λ × false_alarm_every trials. The run length is computed exactly
// for the integer chart by the Markov chain of Brook & Evans (1972): the
// statistic's values below h are the transient states, and the run
// lengths solve (I − R)·L = 1. Entering a bucket's trials at once, and
// looking only at bucket ends, never raises the statistic above the
// trial-by-trial chart's, and starting from 0 a week back never raises it
// above a chart started earlier, so false alarms come at most as often as
// promised (the tests check the computation against a worked example,
// numpy and simulation). The statistic is recomputed from the stored
// cells at each evaluation: a restart, another replica or a backtest with
// only the cells known at t get the same value.
//
// p0 is the metric over the reference period (a window or a fixed range),
// leaving out the buckets the chart itself reads, so that a drop does not
// drag its own baseline down; a reference window wholly inside those
// buckets is rejected when the config is checked. A reference without a single
// failure (or success) is read as having half of one. Or p0 is given as
// expected. Below min_count trials in the reference the outcome is
// unknown.
//
// The rule fires when the statistic reaches h and resolves when it is back
// at 0; between the two the outcome is "hold", which keeps the state. The
// result shows the statistic and h (in nats), p0 ("expected"), p1
// ("alternative"), the proportion over the chart's buckets, the trial rate
// and where the current rise of the statistic began ("run_start").
//
// The lag is a trade-off. Labels do not arrive independently of the
// outcome: a fraud the model caught is confirmed by a review within hours,
// while a fraud it missed surfaces as a chargeback weeks later. In fresh
// buckets the caught frauds are therefore over-represented and recall
// looks better than it is; a drop shows only once the late labels are in.
// A short lag sees a drop sooner but reads those biased, rising figures; a
// lag past the bulk of the label delay reads settled figures but adds the
// whole lag to every detection. Set lag to the time by which nearly all of
// a bucket's labels have arrived (README.md "Join semantics and windows":
// label_timeout bounds it); detection delay is then the lag plus the time
// the chart needs once the drop has matured.
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
