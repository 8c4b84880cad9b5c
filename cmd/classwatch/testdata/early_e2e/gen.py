#!/usr/bin/python3
"""Generate the fixture of cmd/classwatch's early-warning end-to-end test.

The scenario is invented: a fictional support desk scores tickets with two
models, "desk-escalate" (routine or escalate) and "desk-route" (billing,
outage or account). Each model's predictions carry scores in four ways: none,
rounded to 3 decimals, covering only the top classes, and full precision.
Labels come late (some before their prediction, some corrected). In the last
hour the class mix moves (label shift), which the estimated prevalence should
see before the labels do.

expected.json holds, per model and window, the figures of README.md "Early
warning" computed independently: the Brier score with numpy and, for two
classes, scikit-learn's brier_score_loss summed over both classes (which is
2 x theirs when the two scores sum to 1, as README says); the reliability
bins with numpy and, for two classes, sklearn.calibration.calibration_curve
(strategy="uniform", n_bins=10); the estimated prevalence with
numpy.linalg.lstsq followed by README's clip-and-renormalise step; the score
shift with scipy.spatial.distance.jensenshannon. It also holds the exact
answer to a batch of bad lines.

Run with Debian's interpreter: /usr/bin/python3 cmd/classwatch/testdata/early_e2e/gen.py
"""
import datetime as dt
import json
import os

import numpy as np
import scipy
import sklearn
from scipy.spatial.distance import jensenshannon
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss

HERE = os.path.dirname(os.path.abspath(__file__))
START = dt.datetime(2026, 6, 1, 8, 0, 0, tzinfo=dt.timezone.utc)
BUCKET = dt.timedelta(minutes=5)
BINS = 10
# (name, length, lag) in minutes from the watermark W; "ref" is every
# model's reference_window.
WINDOWS = [("ref", 120, 60), ("1h", 60, 0), ("3h", 180, 0)]
MODELS = [
    # name, classes, class mix before and in the last hour, confusion
    ("desk-escalate", ["routine", "escalate"], [0.8, 0.2], [0.55, 0.45],
     [[0.9, 0.1], [0.25, 0.75]]),
    ("desk-route", ["billing", "outage", "account"], [0.5, 0.2, 0.3], [0.3, 0.5, 0.2],
     [[0.8, 0.1, 0.1], [0.15, 0.75, 0.1], [0.2, 0.1, 0.7]]),
]
N = 400  # predictions per model over four hours

rng = np.random.RandomState(20260601)


def ts(t):
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def bucket_of(t):
    epoch = int(t.timestamp())
    b = int(BUCKET.total_seconds())
    return dt.datetime.fromtimestamp(epoch - epoch % b, tz=dt.timezone.utc)


def score_bin(s):
    # README.md "Early warning": 10 equal-width bins, the last includes 1.
    return min(int(np.floor(s * BINS)), BINS - 1)


def off_edge(s):
    """Moves a score off a bin edge, where floor(s*10) and
    calibration_curve's searchsorted may disagree by one bin."""
    if abs(s * BINS - round(s * BINS)) >= 1e-6:
        return s
    return s - 0.001 if s > 0.5 else s + 0.001


def make_scores(i, k, pred_probs):
    """Scores of prediction i: none, rounded to 3 decimals, the top classes
    only, or full precision, in turn."""
    kind = i % 4
    if kind == 0:
        return None
    p = [off_edge(float(x)) for x in pred_probs]
    if kind == 1:
        p = [off_edge(round(x, 3)) for x in p]
    if kind == 2:
        top = sorted(range(k), key=lambda c: -p[c])[:max(1, k - 1)]
        return {c: p[c] for c in top}
    return {c: p[c] for c in range(k)}


def build(name, classes, mix, shifted, confuse):
    k = len(classes)
    preds = []
    for i in range(N):
        at = START + dt.timedelta(seconds=int(rng.randint(0, 4 * 3600)))
        y = int(rng.choice(k, p=shifted if at >= START + dt.timedelta(hours=3) else mix))
        noisy = rng.dirichlet(np.array(confuse[y]) * 8 + 0.2)
        yhat = int(np.argmax(noisy))
        preds.append({"id": "%s-%04d" % (name, i), "at": at, "true": y, "pred": yhat,
                      "scores": make_scores(i, k, noisy)})
    preds.sort(key=lambda p: p["at"])
    # Label versions (id, class, at): 85% labeled; every 10th labeled one
    # is corrected later; 5 arrive before their prediction.
    versions, early = [], set()
    for j, p in enumerate(q for q in preds if rng.rand() < 0.85):
        first = p["true"] if rng.rand() < 0.9 else (p["true"] + 1) % k
        lat = p["at"] + dt.timedelta(minutes=int(rng.randint(1, 30)))
        versions.append((p["id"], first, lat))
        if j % 10 == 3:
            versions.append((p["id"], (first + 1) % k, lat + dt.timedelta(minutes=30)))
        if j % 60 == 7:
            early.add(p["id"])
    return preds, versions, early


def current(versions):
    """The store's rule: the version with the greatest (at, class name)."""
    out = {}
    for v in versions:
        if v[0] not in out or (v[2], v[1]) > (out[v[0]][2], out[v[0]][1]):
            out[v[0]] = v
    return {i: v[1] for i, v in out.items()}


def pred_line(model, classes, p):
    d = {"model": model, "id": p["id"], "at": ts(p["at"]), "predicted": classes[p["pred"]]}
    if p["scores"] is not None:
        d["scores"] = {classes[c]: s for c, s in p["scores"].items()}
    return json.dumps(d, sort_keys=True)


def label_line(model, classes, v):
    return json.dumps({"model": model, "id": v[0], "actual": classes[v[1]], "at": ts(v[2])},
                      sort_keys=True)


def ratio_or_none(a, b):
    return None if b == 0 else float(a) / b


def figures(sel, labels, k, ref):
    """Early-warning figures of predictions sel; ref is the reference's
    (matrix, histograms) or None."""
    counts = np.zeros(k)
    matrix = np.zeros((k, k))
    hist = np.zeros((k, BINS))
    probs, onehot, top, correct = [], [], [], []
    for p in sel:
        counts[p["pred"]] += 1
        y = labels.get(p["id"])
        if y is not None:
            matrix[y][p["pred"]] += 1
        if p["scores"] is None:
            continue  # counts in no score figure
        s = np.array([p["scores"].get(c, 0.0) for c in range(k)])
        for c in range(k):
            hist[c][score_bin(s[c])] += 1
        if y is None:
            continue
        probs.append(s)
        onehot.append(np.eye(k)[y])
        top.append(s[p["pred"]])
        correct.append(1.0 if y == p["pred"] else 0.0)
    f = {"predictions": int(counts.sum()), "scored": len(probs), "brier": None,
         "brier_sklearn": None, "calibration_error": None, "reliability": [],
         "calibration_curve": None, "per_class": {}}
    if probs:
        probs, onehot = np.array(probs), np.array(onehot)
        # numpy: mean over predictions of sum over classes of (s_k - y_k)^2
        f["brier"] = float(np.mean(np.sum((probs - onehot) ** 2, axis=1)))
        if k == 2:
            # scikit-learn 1.2.1: brier_score_loss per class, summed. When a
            # prediction's two scores sum to 1 both terms are equal, which
            # is README's "twice brier_score_loss"; rounded or top-only
            # scores need both terms.
            f["brier_sklearn"] = float(sum(brier_score_loss(onehot[:, c], probs[:, c])
                                           for c in range(k)))
        top, correct = np.array(top), np.array(correct)
        bins = np.minimum(np.floor(top * BINS).astype(int), BINS - 1)
        ece = 0.0
        for b in range(BINS):
            m = bins == b
            n = int(m.sum())
            rb = {"count": n, "mean_score": None, "accuracy": None}
            if n:
                rb["mean_score"] = float(top[m].mean())
                rb["accuracy"] = float(correct[m].mean())
                ece += n / len(top) * abs(rb["accuracy"] - rb["mean_score"])
            f["reliability"].append(rb)
        f["calibration_error"] = float(ece)
        if k == 2:
            # scikit-learn 1.2.1: non-empty bins only
            prob_true, prob_pred = calibration_curve(correct, top, n_bins=BINS, strategy="uniform")
            f["calibration_curve"] = {"accuracy": [float(x) for x in prob_true],
                                      "mean_score": [float(x) for x in prob_pred]}
    est = None
    if ref is not None and counts.sum() > 0 and (ref[0].sum(axis=1) > 0).all():
        rm = ref[0]
        M = (rm / rm.sum(axis=1, keepdims=True)).T  # M[j][i] = P(pred j | actual i)
        q = np.linalg.lstsq(M, counts / counts.sum(), rcond=None)[0]
        q = np.maximum(q, 0)
        est = q / q.sum()
    for c in range(k):
        cf = {"estimated_prevalence": None if est is None else float(est[c]), "score_shift": None}
        if ref is not None and hist[c].sum() > 0 and ref[1][c].sum() > 0:
            cf["score_shift"] = float(jensenshannon(hist[c], ref[1][c]))
        f["per_class"][c] = cf
    return f, (matrix, hist)


def window_sel(preds, frm, to):
    return [p for p in preds if frm <= bucket_of(p["at"]) < to]


expected = {
    "generator": "cmd/classwatch/testdata/early_e2e/gen.py",
    "versions": {"scikit-learn": sklearn.__version__, "scipy": scipy.__version__,
                 "numpy": np.__version__},
    "bucket": "5m", "confidence": 0.95, "models": [],
}
pred_lines, early_lines, label_lines = [], [], []
all_preds = {}
for name, classes, mix, shifted, confuse in MODELS:
    k = len(classes)
    preds, versions, early = build(name, classes, mix, shifted, confuse)
    all_preds[name] = preds
    labels = current(versions)
    W = bucket_of(max(p["at"] for p in preds)) + BUCKET
    pred_lines += [pred_line(name, classes, p) for p in preds]
    early_lines += [label_line(name, classes, v) for v in versions if v[0] in early]
    label_lines += [label_line(name, classes, v) for v in versions if v[0] not in early]
    bounds = {w: (W - dt.timedelta(minutes=lag + length), W - dt.timedelta(minutes=lag))
              for w, length, lag in WINDOWS}
    _, ref = figures(window_sel(preds, *bounds["ref"]), labels, k, None)
    m = {"name": name, "classes": classes, "reference_window": "ref", "windows": {}}
    for w, length, lag in WINDOWS:
        f, _ = figures(window_sel(preds, *bounds[w]), labels, k, ref)
        f.update({"from": ts(bounds[w][0]), "to": ts(bounds[w][1]),
                  "length": "%dm" % length, "lag": "%dm" % lag})
        f["per_class"] = {classes[c]: v for c, v in f["per_class"].items()}
        m["windows"][w] = f
    # The matrix answer for the first two hours, against the same reference.
    frm, to = START, START + dt.timedelta(hours=2)
    f, _ = figures(window_sel(preds, frm, to), labels, k, ref)
    f.update({"from": ts(frm), "to": ts(to)})
    f["per_class"] = {classes[c]: v for c, v in f["per_class"].items()}
    m["period"] = f
    expected["models"].append(m)

# Bad lines (README.md "Early warning" and "HTTP API"): each rejected with
# its line number; the good line without scores is stored.
e = MODELS[0]
bad = [
    {"model": e[0], "id": "bad-sum", "at": ts(START), "predicted": "routine",
     "scores": {"routine": 0.6, "escalate": 0.45}},
    {"model": e[0], "id": "bad-class", "at": ts(START), "predicted": "routine",
     "scores": {"routine": 0.6, "refund": 0.3}},
    {"model": e[0], "id": "bad-high", "at": ts(START), "predicted": "routine",
     "scores": {"routine": 1.2}},
    {"model": e[0], "id": "bad-low", "at": ts(START), "predicted": "escalate",
     "scores": {"routine": -0.1, "escalate": 0.9}},
]
expected["bad"] = {"accepted": 0, "rejected": [
    {"line": 1, "error": '"scores" sum to 1.05, more than 1 (by more than 0.02)'},
    {"line": 2, "error": 'class "refund" is not registered for model "desk-escalate"'},
    {"line": 3, "error": '"scores": "routine" is 1.2, outside [0, 1]'},
    {"line": 4, "error": '"scores": "routine" is -0.1, outside [0, 1]'},
]}

for fname, lines in [("predictions.ndjson", pred_lines), ("labels_early.ndjson", early_lines),
                     ("labels.ndjson", label_lines),
                     ("bad.ndjson", [json.dumps(b, sort_keys=True) for b in bad])]:
    with open(os.path.join(HERE, fname), "w") as fh:
        fh.write("\n".join(lines) + "\n")
with open(os.path.join(HERE, "expected.json"), "w") as fh:
    json.dump(expected, fh, indent=1, sort_keys=True)
    fh.write("\n")
