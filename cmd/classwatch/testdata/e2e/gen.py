#!/usr/bin/python3
"""Generate the end-to-end fixture for cmd/classwatch's e2e test.

The scenario is invented: a fictional warehouse's parcel-inspection camera
classifies parcels as intact, dented, crushed or wet. This script writes the
NDJSON the test posts (with duplicates, a correction chain, early labels,
conflicting and malformed lines) and the figures the daemon must report,
computed independently with scikit-learn and statsmodels from the (actual,
predicted) pairs that the label semantics of windows/store/store.go imply.

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
                             confusion_matrix, f1_score,
                             precision_recall_fscore_support)
from statsmodels.stats.proportion import proportion_confint

HERE = os.path.dirname(os.path.abspath(__file__))
MODEL = "parcel-inspect"
CLASSES = ["intact", "dented", "crushed", "wet"]
START = dt.datetime(2026, 5, 4, 8, 0, 0, tzinfo=dt.timezone.utc)
BUCKET = dt.timedelta(minutes=5)
CONF = 0.95
# Windows configured in the test (name, length, lag), all relative to the
# watermark W = end of the bucket holding the latest prediction.
WINDOWS = [("6h", 6, 0), ("1h", 1, 0), ("2h-matured", 2, 1)]

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

# Rejected line numbers (1-based) the daemon must name.
bad_pred = set(conflicts + malformed)
want_pred_rejected = [i + 1 for i, line in enumerate(pred_batch) if line in bad_pred]
want_label_rejected = [i + 1 for i, line in enumerate(label_batch)
                       if "flattened" in line or line.endswith(":")]


def ratio(a, b):
    return None if b == 0 else a / b


def figures(sel, as_of=None):
    """Everything the API and /metrics report for the predictions in sel."""
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
        c = {"support": int(cm[k].sum()),
             "recall": None if tp + fn == 0 else float(rec[k]),
             "precision": None if tp + fp == 0 else float(prec[k]),
             "specificity": ratio(tn, tn + fp),
             "f1": None if tp + fp == 0 or tp + fn == 0 else float(f1[k]),
             "prevalence": ratio(int(cm[k].sum()), total),
             "predicted_share": ratio(pred_count[k], len(sel)),
             "recall_interval": None, "precision_interval": None}
        if tp + fn:
            # source: statsmodels proportion_confint(method='wilson')
            c["recall_interval"] = [float(x) for x in proportion_confint(tp, tp + fn, 1 - CONF, "wilson")]
        if tp + fp:
            c["precision_interval"] = [float(x) for x in proportion_confint(tp, tp + fp, 1 - CONF, "wilson")]
        per[name] = c
    out["per_class"] = per
    if y_true:
        out["accuracy"] = float(accuracy_score(y_true, y_pred))
        out["balanced_accuracy"] = float(balanced_accuracy_score(y_true, y_pred))
        out["macro_f1"] = float(f1_score(y_true, y_pred, average="macro", zero_division=0))
    else:
        out["accuracy"] = out["balanced_accuracy"] = out["macro_f1"] = None
    return out


expected = {
    "generator": "cmd/classwatch/testdata/e2e/gen.py",
    "versions": {"scikit-learn": sklearn.__version__, "scipy": scipy.__version__,
                 "statsmodels": statsmodels.__version__, "numpy": np.__version__},
    "model": MODEL, "classes": CLASSES, "confidence": CONF, "bucket": "5m",
    "watermark": ts(W),
    "pred_rejected_lines": want_pred_rejected,
    "label_rejected_lines": want_label_rejected,
    "windows": {},
    "periods": [],
}
for name, length, lag in WINDOWS:
    to = W - dt.timedelta(hours=lag)
    frm = to - dt.timedelta(hours=length)
    sel = [p for p in preds if frm <= bucket_of(p["at"]) < to]
    f = figures(sel)
    f.update({"from": ts(frm), "to": ts(to), "length_hours": length, "lag_hours": lag})
    expected["windows"][name] = f

# Audit periods for GET /matrix: one plain, one segment, one as of a time
# before most corrections were known.
as_of = START + dt.timedelta(hours=7)
for frm_h, to_h, seg, asof in [(1, 3, None, None), (0, 6, "dock-b", None), (0, 6, None, as_of)]:
    frm = START + dt.timedelta(hours=frm_h); to = START + dt.timedelta(hours=to_h)
    sel = [p for p in preds if frm <= bucket_of(p["at"]) < to and (seg is None or p["segment"] == seg)]
    f = figures(sel, asof)
    f.update({"from": ts(frm), "to": ts(to), "segment": seg, "as_of": ts(asof) if asof else None})
    expected["periods"].append(f)

with open(os.path.join(HERE, "predictions.ndjson"), "w") as fh:
    fh.write("\n".join(pred_batch) + "\n")
with open(os.path.join(HERE, "labels_early.ndjson"), "w") as fh:
    fh.write("\n".join(label_line(v) for v in early_versions) + "\n")
with open(os.path.join(HERE, "labels.ndjson"), "w") as fh:
    fh.write("\n".join(label_batch) + "\n")
with open(os.path.join(HERE, "expected.json"), "w") as fh:
    json.dump(expected, fh, indent=1, sort_keys=True)
    fh.write("\n")
