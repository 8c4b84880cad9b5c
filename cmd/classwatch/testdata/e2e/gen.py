#!/usr/bin/python3
"""Generate the end-to-end fixture for cmd/classwatch's e2e test.

The scenario is invented: a fictional warehouse's parcel-inspection camera
classifies parcels as intact, dented, crushed or wet. This script writes the
NDJSON the test posts (with duplicates, a correction chain, early labels,
conflicting and malformed lines) and expected.json: the figures the daemon
must report for each window and audit period, computed independently with
scikit-learn and statsmodels from the (actual, predicted) pairs that the
label semantics of windows/store/store.go imply, and the answer each POST
must give, from a simulation of those semantics line by line.

Run with Debian's interpreter: /usr/bin/python3 cmd/classwatch/testdata/e2e/gen.py
"""
import datetime as dt
import json
import os

import numpy as np
import scipy
import sklearn
import statsmodels
from sklearn.metrics import (accuracy_score, balanced_accuracy_score,
                             cohen_kappa_score, confusion_matrix, f1_score,
                             matthews_corrcoef,
                             precision_recall_fscore_support)
from statsmodels.stats.proportion import proportion_confint

HERE = os.path.dirname(os.path.abspath(__file__))
MODEL = "parcel-inspect"
CLASSES = ["intact", "dented", "crushed", "wet"]
START = dt.datetime(2026, 5, 4, 8, 0, 0, tzinfo=dt.timezone.utc)
BUCKET = dt.timedelta(minutes=5)
CONF = 0.95
# Windows configured in the test (name, length, lag), in minutes, all
# relative to the watermark W = end of the bucket holding the latest
# prediction. The 15m window is small enough that some classes are missing
# from it, so some of its ratios are undefined.
WINDOWS = [("6h", 360, 0), ("1h", 60, 0), ("2h-matured", 120, 60), ("15m", 15, 0)]

rng = np.random.RandomState(20260504)


def ts(t):
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def bucket_of(t):
    epoch = int(t.timestamp())
    b = int(BUCKET.total_seconds())
    return dt.datetime.fromtimestamp(epoch - epoch % b, tz=dt.timezone.utc)


# Predictions: 600 parcels over six hours; the true class mix is skewed and
# the camera confuses neighbouring damage types.
true_p = [0.80, 0.10, 0.04, 0.06]
confuse = np.array([
    [0.93, 0.04, 0.01, 0.02],
    [0.20, 0.65, 0.12, 0.03],
    [0.05, 0.25, 0.70, 0.00],
    [0.10, 0.02, 0.00, 0.88],
])
N = 600
preds = []
for i in range(N):
    at = START + dt.timedelta(seconds=int(rng.randint(0, 6 * 3600)))
    y = int(rng.choice(4, p=true_p))
    yhat = int(rng.choice(4, p=confuse[y]))
    preds.append({"id": "parcel-%04d" % i, "at": at, "true": y, "pred": yhat,
                  "segment": ["dock-a", "dock-b"][int(rng.randint(0, 2))]})
preds.sort(key=lambda p: p["at"])
latest = max(p["at"] for p in preds)
W = bucket_of(latest) + BUCKET

# Label versions: (id, actual index, at). 85% of parcels get a label some
# minutes after the prediction; 8% of those get a later correction; 20 labels
# arrive before their prediction (sent in a first label batch).
versions = []
early_ids = set()
for p in preds:
    if rng.rand() >= 0.85:
        continue
    lat = p["at"] + dt.timedelta(minutes=int(rng.randint(5, 240)))
    first = p["true"] if rng.rand() < 0.95 else int(rng.randint(0, 4))
    versions.append((p["id"], first, lat))
    if rng.rand() < 0.08:
        versions.append((p["id"], p["true"] if first != p["true"] else (first + 1) % 4,
                         lat + dt.timedelta(hours=int(rng.randint(1, 48)))))
labeled_ids = sorted({v[0] for v in versions})
for i in rng.choice(len(labeled_ids), 20, replace=False):
    early_ids.add(labeled_ids[i])


def current_label(vs, as_of=None):
    """The store's rule: the version with the greatest (at, class name) among
    those with at <= as_of."""
    vs = [v for v in vs if as_of is None or v[2] <= as_of]
    if not vs:
        return None
    return max(vs, key=lambda v: (v[2], CLASSES[v[1]]))[1]


by_id = {}
for v in versions:
    by_id.setdefault(v[0], []).append(v)

# Lines to send.
def pred_line(p, predicted=None):
    d = {"model": MODEL, "id": p["id"], "at": ts(p["at"]),
         "predicted": CLASSES[p["pred"] if predicted is None else predicted],
         "segment": p["segment"]}
    return json.dumps(d, sort_keys=True)


def label_line(v):
    return json.dumps({"model": MODEL, "id": v[0], "actual": CLASSES[v[1]], "at": ts(v[2])},
                      sort_keys=True)


pred_lines = [pred_line(p) for p in preds]
# 15 exact duplicates (same content) and 6 conflicts (different predicted).
dups = [pred_lines[i] for i in rng.choice(N, 15, replace=False)]
conf_idx = rng.choice(N, 6, replace=False)
conflicts = [pred_line(preds[i], (preds[i]["pred"] + 1) % 4) for i in conf_idx]
malformed = [
    '{"model":"parcel-inspect","id":"parcel-x1","predicted":',  # broken JSON
    json.dumps({"model": MODEL, "predicted": "intact"}),  # no id
    json.dumps({"model": MODEL, "id": "parcel-x2", "predicted": "squashed"}),  # unknown class
    json.dumps({"model": MODEL, "id": "parcel-x3", "at": "yesterday", "predicted": "wet"}),  # bad time
    json.dumps({"model": "no-such-model", "id": "parcel-x4", "predicted": "wet"}),  # unknown model
]
pred_batch = pred_lines + dups + conflicts + malformed
order = rng.permutation(len(pred_batch))
pred_batch = [pred_batch[i] for i in order]
# The first line of an id stands and a later one with other content is the
# conflict, so a conflict the shuffle put first swaps places with the first
# line of its original content.
for i, line in zip(conf_idx, conflicts):
    bad, good = pred_batch.index(line), pred_batch.index(pred_lines[i])
    if bad < good:
        pred_batch[bad], pred_batch[good] = pred_batch[good], pred_batch[bad]

early_versions = [v for v in versions if v[0] in early_ids]
late_versions = [v for v in versions if v[0] not in early_ids]
label_dups = [late_versions[i] for i in rng.choice(len(late_versions), 12, replace=False)]
label_batch = [label_line(v) for v in late_versions + label_dups]
label_batch += [
    json.dumps({"model": MODEL, "id": "parcel-0001", "actual": "flattened"}),  # unknown class
    '{"model":"parcel-inspect","id":',  # broken JSON
]
order = rng.permutation(len(label_batch))
label_batch = [label_batch[i] for i in order]

def simulate_predictions(lines):
    """Each prediction line's outcome under windows/store/store.go: the first
    line of an id is stored, a later equal one is a duplicate, a later one
    with other content a conflict (rejected); malformed lines are rejected."""
    first, out = {}, []
    for line in lines:
        if line in malformed:
            out.append("rejected")
            continue
        pid = json.loads(line)["id"]
        if pid not in first:
            first[pid] = line
            out.append("accepted")
        else:
            out.append("duplicate" if first[pid] == line else "rejected")
    return out


def simulate_labels(lines, known_ids, arrived):
    """Each label line's outcome under windows/store/store.go: a label for an
    unknown prediction is early; for a known one it is matched (first
    version), corrected (the current label changed) or a duplicate (it did
    not). arrived maps id -> versions seen so far and is updated."""
    out = []
    for line in lines:
        try:
            d = json.loads(line)
        except ValueError:
            out.append("rejected")
            continue
        if d["actual"] not in CLASSES:
            out.append("rejected")
            continue
        v = (d["id"], CLASSES.index(d["actual"]),
             dt.datetime.strptime(d["at"], "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=dt.timezone.utc))
        if d["id"] not in known_ids:
            out.append("early")
            continue
        before = current_label(arrived.get(d["id"], []))
        if v not in arrived.setdefault(d["id"], []):
            arrived[d["id"]].append(v)
        after = current_label(arrived[d["id"]])
        out.append("matched" if before is None else "corrected" if after != before else "duplicate")
    return out


def ingest_summary(outcomes):
    """The response counts and rejected line numbers (1-based) of a batch."""
    return {"accepted": sum(o not in ("duplicate", "rejected") for o in outcomes),
            "duplicates": outcomes.count("duplicate"),
            "rejected_lines": [i + 1 for i, o in enumerate(outcomes) if o == "rejected"]}


early_lines = [label_line(v) for v in early_versions]
pred_outcomes = simulate_predictions(pred_batch)
early_outcomes = simulate_labels(early_lines, set(), {})
# The early labels join when their predictions arrive; later lines for
# those ids would be judged against them.
arrived = {pid: list(vs) for pid, vs in by_id.items() if pid in early_ids}
late_outcomes = simulate_labels(label_batch, {p["id"] for p in preds}, arrived)

# The rejected lines must be exactly the conflicts and the malformed lines.
assert [i + 1 for i, line in enumerate(pred_batch) if line in set(conflicts + malformed)] == \
    ingest_summary(pred_outcomes)["rejected_lines"]
assert [i + 1 for i, line in enumerate(label_batch) if "flattened" in line or line.endswith(":")] == \
    ingest_summary(late_outcomes)["rejected_lines"]


def ratio(a, b):
    return None if b == 0 else a / b


def wilson(successes, n):
    # source: statsmodels proportion_confint(method='wilson')
    if n == 0:
        return None
    return [float(x) for x in proportion_confint(successes, n, 1 - CONF, "wilson")]


def figures(sel, as_of=None):
    """Everything the API and /metrics report for the predictions in sel.
    Undefined figures are None. Where scikit-learn substitutes 0 for an
    undefined ratio, None is written instead; F1 follows the design's macro
    F1 (mean over the classes present on either axis), so a class present
    on either axis has an F1 (scikit-learn's, zero_division=0) and only a
    class absent from both has none."""
    y_true, y_pred = [], []
    pred_count = [0] * 4
    for p in sel:
        pred_count[p["pred"]] += 1
        lab = current_label(by_id.get(p["id"], []), as_of)
        if lab is not None:
            y_true.append(lab)
            y_pred.append(p["pred"])
    labels = list(range(4))
    out = {"predictions": len(sel), "labeled": len(y_true),
           "label_coverage": ratio(len(y_true), len(sel))}
    cm = confusion_matrix(y_true, y_pred, labels=labels) if y_true else np.zeros((4, 4), int)
    out["matrix"] = cm.tolist()
    total = int(cm.sum())
    per = {}
    if y_true:
        # source: scikit-learn precision_recall_fscore_support(average=None)
        prec, rec, f1, sup = precision_recall_fscore_support(
            y_true, y_pred, labels=labels, average=None, zero_division=0)
    for k, name in enumerate(CLASSES):
        tp = int(cm[k, k]); fn = int(cm[k].sum()) - tp; fp = int(cm[:, k].sum()) - tp
        tn = total - tp - fn - fp
        per[name] = {
            "support": int(cm[k].sum()),
            "predictions": pred_count[k],
            "recall": None if tp + fn == 0 else float(rec[k]),
            "precision": None if tp + fp == 0 else float(prec[k]),
            "specificity": ratio(tn, tn + fp),
            "f1": None if tp + fp + fn == 0 else float(f1[k]),
            "prevalence": ratio(int(cm[k].sum()), total),
            "predicted_share": ratio(pred_count[k], len(sel)),
            "recall_interval": wilson(tp, tp + fn),
            "precision_interval": wilson(tp, tp + fp),
            "specificity_interval": wilson(tn, tn + fp),
        }
    out["per_class"] = per
    out["accuracy"] = out["balanced_accuracy"] = out["macro_f1"] = None
    out["mcc"] = out["kappa"] = None
    if y_true:
        out["accuracy"] = float(accuracy_score(y_true, y_pred))
        out["balanced_accuracy"] = float(balanced_accuracy_score(y_true, y_pred))
        out["macro_f1"] = float(f1_score(y_true, y_pred, average="macro", zero_division=0))
        # scikit-learn answers 0 for MCC when either axis holds one class
        # (its denominator is 0) and NaN for kappa when both hold the same
        # one class: both are undefined.
        if len(set(y_true)) > 1 and len(set(y_pred)) > 1:
            out["mcc"] = float(matthews_corrcoef(y_true, y_pred))
        kappa = float(cohen_kappa_score(y_true, y_pred))
        out["kappa"] = None if np.isnan(kappa) else kappa
    return out


def minutes(m):
    return "%dm" % m


expected = {
    "generator": "cmd/classwatch/testdata/e2e/gen.py",
    "versions": {"scikit-learn": sklearn.__version__, "scipy": scipy.__version__,
                 "statsmodels": statsmodels.__version__, "numpy": np.__version__},
    "model": MODEL, "classes": CLASSES, "confidence": CONF, "bucket": "5m",
    "watermark": ts(W),
    "ingest": {"predictions": ingest_summary(pred_outcomes),
               "labels_early": ingest_summary(early_outcomes),
               "labels": ingest_summary(late_outcomes)},
    # classwatch_predictions_received_total counts stored and duplicate
    # lines; classwatch_labels_received_total counts label lines by outcome.
    "predictions_received": sum(o in ("accepted", "duplicate") for o in pred_outcomes),
    "label_results": {r: (early_outcomes + late_outcomes).count(r)
                      for r in ("matched", "early", "duplicate", "corrected")},
    "windows": {},
    "periods": [],
}
for name, length, lag in WINDOWS:
    to = W - dt.timedelta(minutes=lag)
    frm = to - dt.timedelta(minutes=length)
    sel = [p for p in preds if frm <= bucket_of(p["at"]) < to]
    f = figures(sel)
    f.update({"from": ts(frm), "to": ts(to), "length": minutes(length), "lag": minutes(lag)})
    expected["windows"][name] = f

# Audit periods for GET /matrix and classwatch audit: one plain, one
# segment, one as of a time before most corrections were known, one short
# period of one segment as of that time (some classes missing), and one
# before the first prediction (every ratio undefined). Bounds in minutes
# from START.
as_of = START + dt.timedelta(hours=7)
for frm_m, to_m, seg, asof in [(60, 180, None, None), (0, 360, "dock-b", None), (0, 360, None, as_of),
                               (120, 135, "dock-a", as_of), (-60, 0, None, None)]:
    frm = START + dt.timedelta(minutes=frm_m); to = START + dt.timedelta(minutes=to_m)
    sel = [p for p in preds if frm <= bucket_of(p["at"]) < to and (seg is None or p["segment"] == seg)]
    f = figures(sel, asof)
    f.update({"from": ts(frm), "to": ts(to), "segment": seg, "as_of": ts(asof) if asof else None})
    expected["periods"].append(f)

with open(os.path.join(HERE, "predictions.ndjson"), "w") as fh:
    fh.write("\n".join(pred_batch) + "\n")
with open(os.path.join(HERE, "labels_early.ndjson"), "w") as fh:
    fh.write("\n".join(early_lines) + "\n")
with open(os.path.join(HERE, "labels.ndjson"), "w") as fh:
    fh.write("\n".join(label_batch) + "\n")
with open(os.path.join(HERE, "expected.json"), "w") as fh:
    json.dump(expected, fh, indent=1, sort_keys=True)
    fh.write("\n")
