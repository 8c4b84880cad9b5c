// Package sim generates the simulated traffic of "classwatch demo": the two
// classifiers of Plumtwig Mutual, a fictional retail bank, logging their
// predictions and receiving late labels, on a simulated clock that runs
// thousands of times faster than the wall clock.
//
// # Scenario
//
// ticket-router sends each support ticket to one of eight queues. The queue
// mix is skewed (billing and app-login are common, fraud-report rare) and the
// model confuses similar queues more than unrelated ones (billing with
// statements, cards with fraud-report). Agents re-route tickets, so a label
// arrives minutes to hours after the prediction; some tickets are never
// reviewed and stay unlabeled. Once, a mobile-app outage floods the desk with
// app-login tickets for a day (a faulty release broke sign-in): a class
// prevalence shift.
//
// card-screen scores card payments as legit or fraud, with fraud around
// 1.4%. A blocked payment is reviewed within hours; a missed fraud comes back
// as a chargeback days to weeks later; a payment nobody disputes is never
// labeled, and the daemon's default_label (legit after label_timeout) fills
// it in. On day nine (once a whole day's labels have matured), a wave of
// a new fraud pattern hits online payments: fraud rises to about 7.4% and
// the model catches under a third of the new pattern, with borderline
// scores, so fraud recall falls from about 0.85 to about 0.40. The
// predicted mix moves at once (payments predicted fraud go from about 1.6%
// to 3.4%),
// while the chargebacks that show the missed frauds come back a day or
// more later: the label-free early rule (EarlyRule) can see the wave
// before the recall rules (RecallRule) can.
//
// Both streams carry what real pipelines send: re-sent lines (duplicates),
// labels corrected later, labels that reach the daemon before their
// prediction (a log shipper running late), and, rarely, malformed lines that
// the daemon must reject one by one.
//
// # Pieces
//
// Generator is the pure, deterministic part: for a seed it yields the same
// NDJSON lines, stamped with the simulated time at which each is sent. Run
// drives a Generator from the wall clock and posts the lines to a daemon's
// /v1/predictions and /v1/labels. Config returns the daemon configuration the
// scenario is written for, with the alert rules it is meant to trigger.
package sim
