// Package windows holds classwatch's arithmetic: the confusion matrix, the
// metrics and confidence intervals computed from it, bucket and window
// bounds, and the rolling per-window state exported to Prometheus.
//
// Every window metric is defined once, in MetricDefs: its name in the JSON
// API, the audit formats and alert rules, its Prometheus family and help,
// its scope (per window or per class), its range and interval, and how it
// is read from Metrics. The exporter, the API, the audit report and the
// rules all iterate that table.
//
// # Early warning
//
// Before labels arrive, the predicted-class mix and the scores still carry
// evidence. Per bucket the store keeps additive score aggregates (score
// histograms per class over store.ScoreBins fixed bins, and over labeled
// predictions with scores the calibration bins of the predicted class's
// score and the Brier sum); the Tracker keeps them per bucket and sums them
// per window like the cells, so a window costs O(buckets) to move. From
// them, against the model's ReferenceWindow (ModelOptions):
//
//   - estimated prevalence: black-box shift estimation (stats.BBSE; Lipton,
//     Wang & Smola 2018) from the reference's labeled matrix and the
//     window's predicted counts, with a delta-method interval; undefined
//     when a class has no labeled example in the reference or the window
//     has no prediction;
//   - estimated precision under label shift: q_k·C_kk/μ_k, the estimated
//     prevalence times the reference's recall of k over the window's
//     predicted share of k (EstimatedPrecision), clipped to 1;
//   - Brier score (Brier 1950), expected calibration error over 10
//     equal-width bins of the predicted class's score, and the reliability
//     bins (ScoreSums); these need no reference;
//   - score shift: the Jensen–Shannon distance (Lin 1991) between each
//     class's score histogram in the window and in the reference.
//
// Predictions without scores count in none of the score figures. These are
// estimates resting on assumptions (label shift: P(predicted | actual)
// unchanged since the reference) that the data cannot confirm; monitoring
// is evidence, not validation, and a model whose errors can harm people is
// judged under the regulations and licensed practice that govern it.
//
// # Series budget of /metrics
//
// A scrape's size grows with models × windows × classes², the confusion
// cells: at the default caps (100 models, 50 classes, three windows) a full
// scrape has 888,100 series, 84 MB of text. The gatherer therefore keeps a
// per-scrape series budget, TrackerOptions.MaxSeries (DefaultMaxSeries,
// 80,000 series, about 7 MB at those caps). Each model's series fall in four
// tiers: (1) the watermark and the window series (bounds, counts,
// window-scope figures), (2) the per-class series, (3) the non-zero
// confusion cells, (4) the zero confusion cells. Tier by tier, every model
// gets the tier while the budget holds it; the first tier that does not fit
// for all goes to the models with the fewest such series first (ties by
// name) while it fits, and no model gets a later tier. A model thus loses
// its zero cells first, then all its cells, then its per-class series,
// never part of a tier, and the same counts give the same scrape.
// classwatch_scrape_omitted_series{model} says how many series each model
// lost (0 when none); it is exported outside the budget, so a scrape has at
// most MaxSeries series plus one per model. CheckScrapeBudget tells from
// the configured caps whether a full scrape can exceed the budget.
//
// Everything here except the rolling state is a pure function of its
// arguments: no I/O and no clock. The watermark and "now" arrive as
// parameters, so a figure is reproducible from the counts that produced it.
package windows
