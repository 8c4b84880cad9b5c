#!/usr/bin/python3
"""Write the reference values of classwatch's early-warning figures.

Run from the repository root with Debian's interpreter:

    /usr/bin/python3 windows/testdata/early/gen.py [OUTDIR]

It writes early.json to OUTDIR, by default the folder of this file, with
fixed seeds and sorted keys, so CI can re-run it and fail on any difference.
The file records the library versions that produced it.

* bbse: black-box shift estimation (Lipton, Wang & Smola 2018). M[j][i] =
  ref[i][j] / row sum i, mu = the window's predicted shares; the raw
  solution is numpy.linalg.lstsq(M, mu, rcond=None); negatives are set to 0
  and the result renormalised. The delta-method standard errors follow the
  formula in windows/stats/labelshift.go, computed here with numpy's
  pseudo-inverse (same cutoff as lstsq: eps * k * largest singular value).
* calibration: labeled predictions with scores. The multi-class Brier score
  is the mean of sum_k (s_k - 1[actual = k])^2 over predictions, a missing
  class score counting as 0 (numpy); for two classes it is also
  2 * sklearn.metrics.brier_score_loss. Reliability bins are 10 equal-width
  bins of the predicted class's score (last bin includes 1): count, mean
  score, accuracy (numpy); for two classes the non-empty bins are also
  sklearn.calibration.calibration_curve(correct, score, n_bins=10,
  strategy="uniform"). ECE = sum_b n_b / N * |accuracy_b - mean score_b|.
"""

import os

for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"

import json  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402
import scipy  # noqa: E402
import sklearn  # noqa: E402
from scipy.stats import norm  # noqa: E402
from sklearn.calibration import calibration_curve  # noqa: E402
from sklearn.metrics import brier_score_loss  # noqa: E402

CONFIDENCE = 0.95
BINS = 10


def bbse(ref, current, confidence):
    ref = np.asarray(ref, dtype=float)
    current = np.asarray(current, dtype=float)
    k = len(current)
    support = ref.sum(axis=1)
    n = current.sum()
    M = (ref / support[:, None]).T
    mu = current / n
    raw = np.linalg.lstsq(M, mu, rcond=None)[0]
    q = np.clip(raw, 0, None)
    q = q / q.sum()
    P = np.linalg.pinv(M, rcond=np.finfo(float).eps * k)
    sigma = (np.diag(mu) - np.outer(mu, mu)) / n
    for i in range(k):
        m = M[:, i]
        sigma += q[i] ** 2 * (np.diag(m) - np.outer(m, m)) / support[i]
    se = np.sqrt(np.clip(np.diag(P @ sigma @ P.T), 0, None))
    z = norm.ppf(1 - (1 - confidence) / 2)
    lo = np.minimum(np.clip(raw - z * se, 0, None), q)
    hi = np.maximum(np.clip(raw + z * se, None, 1), q)
    return dict(ref=ref.astype(int).tolist(), current=current.astype(int).tolist(), confidence=confidence,
                raw=raw.tolist(), prevalence=q.tolist(), se=se.tolist(), lo=lo.tolist(), hi=hi.tolist())


def bbse_cases():
    rng = np.random.default_rng(20260305)
    cases = []
    # Three classes, a good classifier, a shifted mix.
    cases.append(bbse([[850, 100, 50], [60, 420, 20], [10, 30, 160]], [300, 500, 200], CONFIDENCE))
    # Five random classes.
    ref = rng.integers(0, 40, size=(5, 5)) + np.diag(rng.integers(100, 300, size=5))
    cases.append(bbse(ref.tolist(), rng.integers(50, 400, size=5).tolist(), 0.9))
    # Singular: classes 1 and 2 have the same confusion row, so M has rank 2.
    cases.append(bbse([[80, 10, 10], [20, 40, 40], [20, 40, 40]], [100, 120, 80], CONFIDENCE))
    # A mix the reference cannot produce: the raw solution has a negative part.
    cases.append(bbse([[90, 10, 0], [10, 80, 10], [0, 10, 90]], [10, 300, 690], CONFIDENCE))
    return cases


def calibration_case(rng, classes, n, top, miscalibrate):
    k = len(classes)
    preds = []
    for _ in range(n):
        if k == 2:
            p = float(rng.uniform(0.02, 0.98))
            s = np.array([1 - p, p])
        else:
            s = rng.dirichlet(np.ones(k) * 0.7)
        truth = s ** miscalibrate
        truth = truth / truth.sum()
        actual = int(rng.choice(k, p=truth))
        predicted = int(np.argmax(s))
        keep = np.argsort(-s)[:top]
        scores = {classes[c]: float(s[c]) for c in sorted(keep)}
        preds.append(dict(scores=scores, predicted=classes[predicted], actual=classes[actual]))
    # Dense scores, a missing class counting as 0.
    S = np.array([[p["scores"].get(c, 0.0) for c in classes] for p in preds])
    Y = np.array([[1.0 if p["actual"] == c else 0.0 for c in classes] for p in preds])
    brier = float(np.mean(np.sum((S - Y) ** 2, axis=1)))
    top_score = np.array([p["scores"].get(p["predicted"], 0.0) for p in preds])
    correct = np.array([1.0 if p["predicted"] == p["actual"] else 0.0 for p in preds])
    ids = np.minimum(np.floor(top_score * BINS).astype(int), BINS - 1)
    bins, ece = [], 0.0
    for b in range(BINS):
        sel = ids == b
        cnt = int(sel.sum())
        if cnt == 0:
            bins.append(dict(count=0, mean_score=None, accuracy=None))
            continue
        ms, acc = float(top_score[sel].mean()), float(correct[sel].mean())
        bins.append(dict(count=cnt, mean_score=ms, accuracy=acc))
        ece += cnt / n * abs(acc - ms)
    case = dict(classes=classes, predictions=preds, brier=brier, ece=ece, bins=bins)
    if k == 2:
        pos = classes[1]
        y = np.array([1 if p["actual"] == pos else 0 for p in preds])
        case["brier_sklearn"] = float(brier_score_loss(y, S[:, 1]))
        prob_true, prob_pred = calibration_curve(correct, top_score, n_bins=BINS, strategy="uniform")
        case["calibration_curve"] = dict(prob_true=prob_true.tolist(), prob_pred=prob_pred.tolist())
    return case


def calibration_cases():
    rng = np.random.default_rng(7)
    return [
        calibration_case(rng, ["legit", "fraud"], 400, 2, 1.0),
        calibration_case(rng, ["legit", "fraud"], 300, 2, 2.5),
        calibration_case(rng, ["billing", "outage", "account", "other"], 500, 4, 1.5),
        calibration_case(rng, ["intact", "dented", "crushed", "wet", "torn"], 500, 2, 0.8),
    ]


def main():
    out = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
    doc = dict(
        generator="windows/testdata/early/gen.py",
        versions=dict(python=platform.python_version(), numpy=np.__version__, scipy=scipy.__version__,
                      sklearn=sklearn.__version__),
        bbse=bbse_cases(),
        calibration=calibration_cases(),
    )
    with open(os.path.join(out, "early.json"), "w") as f:
        json.dump(doc, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
