#!/usr/bin/python3
"""Write the reference values the windows and windows/stats tests compare against.

Run from the repository root with Debian's interpreter:

    /usr/bin/python3 windows/testdata/reference/gen.py [OUTDIR]

It needs python3-sklearn, python3-scipy and python3-statsmodels and writes
metrics.json, digits.json and stats.json to OUTDIR, by default the folder of
this file. The output is deterministic (fixed seeds, single-threaded BLAS,
sorted keys), so CI can re-run it and fail on
`git diff --exit-code windows/testdata/reference`; the Go test
TestReferenceFilesCurrent does the same when CLASSWATCH_CHECK_REFERENCE=1.
Each file records the library versions that produced it.

Conventions that differ between classwatch and the libraries, and how this
script bridges them:

* Undefined ratios. classwatch reports a ratio with a zero denominator as
  null; scikit-learn returns its zero_division value instead. A per-class
  precision, recall, F1 or specificity is written as null exactly when
  scikit-learn's answer differs between zero_division=0 and zero_division=1,
  i.e. when scikit-learn itself had to substitute a value.
* matthews_corrcoef returns 0 when one of its variances is zero; that case
  (fewer than two classes among the actual or among the predicted labels) is
  written as null. cohen_kappa_score returns NaN when undefined: null.
* Prevalence, predicted share and label coverage have no library function;
  they are computed with numpy from their definitions.
* PSI has no library function either; it is computed with numpy from
  sum((a - e) * ln(a / e)) over shares, empty bins set to epsilon.
* Chi-square and G tests: categories where both counts are zero are dropped
  before scipy sees the table (scipy rejects a zero expected frequency).
"""

import os

# Pin BLAS to one thread before numpy loads, so that the logistic regression
# below is fitted in the same order on every machine.
for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"

import json  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import random  # noqa: E402
import sys  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import scipy  # noqa: E402
import sklearn  # noqa: E402
import statsmodels  # noqa: E402
from scipy.spatial.distance import jensenshannon  # noqa: E402
from scipy.stats import chi2_contingency  # noqa: E402
from sklearn.datasets import load_digits  # noqa: E402
from sklearn.linear_model import LogisticRegression  # noqa: E402
from sklearn.metrics import (  # noqa: E402
    accuracy_score,
    balanced_accuracy_score,
    cohen_kappa_score,
    confusion_matrix,
    f1_score,
    matthews_corrcoef,
    multilabel_confusion_matrix,
    precision_recall_fscore_support,
    recall_score,
)
from sklearn.model_selection import train_test_split  # noqa: E402
from statsmodels.stats.multitest import multipletests  # noqa: E402
from statsmodels.stats.proportion import (  # noqa: E402
    confint_proportions_2indep,
    proportion_confint,
    proportions_ztest,
)

OUTDIR = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
SEED = 20260301

# Newcombe (1998), Statistics in Medicine 17:857-872, worked examples of the
# Wilson interval, from memory: (x, n, lo, hi) to 4 decimals.
NEWCOMBE_1998 = [
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718),
]

# Newcombe (1998), "Interval estimation for the difference between
# independent proportions: comparison of eleven methods", Statistics in
# Medicine 17:873-890, worked examples of method 10 (hybrid score), from
# memory: (x1, n1, x2, n2, lo, hi) to 4 decimals.
NEWCOMBE_1998_DIFF = [
    (56, 70, 48, 80, 0.0524, 0.3339),
    (9, 10, 3, 10, 0.1705, 0.8090),
    (6, 7, 2, 7, 0.0582, 0.8062),
    (5, 56, 0, 29, -0.0381, 0.1926),
    (0, 10, 0, 20, -0.1611, 0.2775),
]

CONFIDENCES = [0.95, 0.95, 0.95, 0.9, 0.99, 0.8, 0.999]


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
        "statsmodels": statsmodels.__version__,
    }


def num(x):
    """A float for JSON, or None for NaN."""
    x = float(x)
    return None if math.isnan(x) else x


def undefined_aware(f):
    """Run f(zero_division) for 0 and 1; null where the two answers differ."""
    a = np.asarray(f(0), dtype=float)
    b = np.asarray(f(1), dtype=float)
    return [None if x != y else float(x) for x, y in zip(a.ravel(), b.ravel())]


def wilson(x, n, alpha):
    """statsmodels' Wilson interval, or None for n = 0.

    Counts are passed as floats: statsmodels 0.13.5 squares nobs in int64,
    which overflows (and returns NaN) once nobs exceeds about 3e9.
    """
    if n == 0:
        return None
    lo, hi = proportion_confint(float(x), float(n), alpha=alpha, method="wilson")
    return [float(lo), float(hi)]


def reference_metrics(y_true, y_pred, weight, k, unlabeled, confidence):
    """Every figure classwatch's Compute returns, from the libraries.

    weight is None for raw samples (one event each) or the events' counts.
    """
    labels = list(range(k))
    alpha = 1 - confidence
    y_true = np.asarray(y_true, dtype=np.int64)
    y_pred = np.asarray(y_pred, dtype=np.int64)
    w = None if weight is None else np.asarray(weight, dtype=np.int64)
    total = len(y_true) if w is None else int(w.sum())
    kw = {} if w is None else {"sample_weight": w}

    if total == 0:
        # The libraries reject empty input; an empty matrix has no ratios.
        cm = np.zeros((k, k), dtype=np.int64)
        mcm = np.zeros((k, 2, 2), dtype=np.int64)
    else:
        cm = confusion_matrix(y_true, y_pred, labels=labels, **kw)
        mcm = multilabel_confusion_matrix(y_true, y_pred, labels=labels, **kw)
    # With sample weights sklearn returns float counts; they are whole numbers.
    mcm = np.rint(mcm).astype(np.int64)
    tn, fp, fn, tp = (mcm[:, 0, 0], mcm[:, 0, 1], mcm[:, 1, 0], mcm[:, 1, 1])

    col = cm.sum(axis=0)
    predicted = col + (np.zeros(k, dtype=np.int64) if unlabeled is None else np.asarray(unlabeled))
    predictions = int(predicted.sum())

    out = {
        "cm": cm.tolist(),
        "tp": tp.tolist(),
        "fp": fp.tolist(),
        "fn": fn.tolist(),
        "tn": tn.tolist(),
        "predictions": predictions,
        "labeled": total,
        "label_coverage": None if predictions == 0 else total / predictions,
        "predicted_share": [None if predictions == 0 else int(c) / predictions for c in predicted],
        "prevalence": [None if total == 0 else int(r) / total for r in cm.sum(axis=1)],
    }
    if total == 0:
        out.update(
            support=[0] * k,
            precision=[None] * k,
            recall=[None] * k,
            f1=[None] * k,
            specificity=[None] * k,
            accuracy=None,
            balanced_accuracy=None,
            macro_f1=None,
            mcc=None,
            kappa=None,
        )
    else:
        def prfs(zd):
            return precision_recall_fscore_support(
                y_true, y_pred, labels=labels, average=None, zero_division=zd, **kw
            )

        out["precision"] = undefined_aware(lambda zd: prfs(zd)[0])
        out["recall"] = undefined_aware(lambda zd: prfs(zd)[1])
        out["f1"] = undefined_aware(lambda zd: prfs(zd)[2])
        out["support"] = [int(s) for s in prfs(0)[3]]
        # Specificity of class c is the recall of "not c" in the one-vs-rest problem.
        out["specificity"] = [
            undefined_aware(
                lambda zd, c=c: recall_score(y_true != c, y_pred != c, zero_division=zd, **kw)
            )[0]
            for c in labels
        ]
        out["accuracy"] = float(accuracy_score(y_true, y_pred, **kw))
        out["balanced_accuracy"] = float(balanced_accuracy_score(y_true, y_pred, **kw))
        present = [c for c in labels if cm[c, :].sum() > 0 or cm[:, c].sum() > 0]
        out["macro_f1"] = float(
            f1_score(y_true, y_pred, labels=present, average="macro", zero_division=0, **kw)
        )
        one_actual = np.count_nonzero(cm.sum(axis=1)) < 2
        one_predicted = np.count_nonzero(col) < 2
        out["mcc"] = None if one_actual or one_predicted else float(matthews_corrcoef(y_true, y_pred, **kw))
        out["kappa"] = num(cohen_kappa_score(y_true, y_pred, **kw))

    out["recall_interval"] = [wilson(tp[c], tp[c] + fn[c], alpha) for c in labels]
    out["precision_interval"] = [wilson(tp[c], tp[c] + fp[c], alpha) for c in labels]
    out["specificity_interval"] = [wilson(tn[c], tn[c] + fp[c], alpha) for c in labels]
    return out


def sample_classifier(rng, k, n, kind):
    """Draw n (actual, predicted) pairs over k classes for one scenario kind."""
    if kind == "uniform":
        return [(rng.randrange(k), rng.randrange(k)) for _ in range(n)]
    # Imbalanced prevalence: a few common classes, a long tail of rare ones.
    prior = [rng.random() ** 4 + 1e-3 for _ in range(k)]
    actual = rng.choices(range(k), weights=prior, k=n)
    if kind == "perfect":
        return [(a, a) for a in actual]
    if kind == "worst":
        return [(a, (a + 1 + rng.randrange(k - 1)) % k) for a in actual]
    if kind == "majority":
        top = max(range(k), key=lambda c: prior[c])
        return [(a, top) for a in actual]
    if kind == "one-actual":
        a = rng.randrange(k)
        return [(a, a if rng.random() < 0.6 else rng.randrange(k)) for _ in range(n)]
    if kind == "one-both":
        a = rng.randrange(k)
        return [(a, a)] * n
    if kind == "absent":
        # Only half of the classes (rounded up) ever occur, on either axis.
        live = rng.sample(range(k), (k + 1) // 2)
        return [(rng.choice(live), rng.choice(live)) for _ in range(n)]
    # "skilled": right with probability acc, else a uniformly random class.
    acc = rng.choice([0.5, 0.8, 0.95, 0.99])
    return [(a, a if rng.random() < acc else rng.randrange(k)) for a in actual]


def matrix_cases(rng):
    kinds = ["uniform", "skilled", "skilled", "perfect", "worst", "majority",
             "one-actual", "one-both", "absent"]
    cases = []
    i = 0

    def add(name, k, events, weighted, unlabeled, confidence):
        nonlocal i
        i += 1
        y_true = [e[0] for e in events]
        y_pred = [e[1] for e in events]
        weight = [e[2] for e in events] if weighted else None
        cases.append({
            "name": "%03d-%s-k%d" % (i, name, k),
            "classes": k,
            "confidence": confidence,
            "events": [list(e) for e in events],
            "weighted": weighted,
            "unlabeled": unlabeled,
            "want": reference_metrics(y_true, y_pred, weight, k, unlabeled, confidence),
        })

    def maybe_unlabeled(k):
        if rng.random() < 0.4:
            return [rng.choice([0, 0, 1, 3, 40]) for _ in range(k)]
        return None

    # Raw samples: sklearn sees one row per prediction, no weights.
    for k in range(2, 21):
        for kind in kinds:
            n = rng.choice([1, 2, 3, 7, 30, 120, 400])
            pairs = sample_classifier(rng, k, n, kind)
            add(kind, k, [(a, p, 1) for a, p in pairs], False, maybe_unlabeled(k),
                rng.choice(CONFIDENCES))
    # Large counts as weighted events (cells of many buckets), with repeats of
    # the same cell so that summing events is exercised.
    for _ in range(40):
        k = rng.randrange(2, 21)
        kind = rng.choice(kinds)
        pairs = sample_classifier(rng, k, rng.choice([5, 20, 60]), kind)
        scale = rng.choice([10, 1000, 10**6, 10**8])
        events = [(a, p, rng.randrange(1, scale + 1)) for a, p in pairs]
        add("weighted-" + kind, k, events, True, maybe_unlabeled(k), rng.choice(CONFIDENCES))
    # Edge cases: nothing labeled (with and without unlabeled predictions),
    # a single example, a two-class majority-only classifier.
    add("empty", 3, [], False, None, 0.95)
    add("unlabeled-only", 4, [], False, [5, 0, 2, 1], 0.95)
    add("single", 2, [(1, 0, 1)], False, None, 0.95)
    add("majority-1pct", 2, [(0, 0, 9900), (1, 0, 100)], True, None, 0.95)
    add("majority-unlabeled", 2, [(0, 0, 990), (1, 0, 10)], True, [500, 0], 0.9)
    return cases


def digits_case():
    """A real classifier on a real data set: logistic regression on digits."""
    x, y = load_digits(return_X_y=True)
    x_train, x_test, y_train, y_test = train_test_split(
        x, y, test_size=0.3, random_state=7, stratify=y
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = LogisticRegression(max_iter=10000, random_state=0).fit(x_train, y_train)
    y_pred = model.predict(x_test)
    return {
        "dataset": "sklearn.datasets.load_digits",
        "model": "LogisticRegression(max_iter=10000, random_state=0)",
        "split": "train_test_split(test_size=0.3, random_state=7, stratify=y)",
        "classes": [str(c) for c in range(10)],
        "confidence": 0.95,
        "y_true": [int(v) for v in y_test],
        "y_pred": [int(v) for v in y_pred],
        "want": reference_metrics(y_test, y_pred, None, 10, None, 0.95),
    }


def interval_cases(rng):
    xs = [(x, n) for x, n, _, _ in NEWCOMBE_1998]
    xs += [(0, 1), (1, 1), (0, 2), (1, 2), (2, 2), (5, 5), (0, 1000), (1000, 1000),
           (1, 10**6), (10**6 - 1, 10**6), (3, 10**9), (123456789, 10**9)]
    for _ in range(60):
        n = rng.choice([3, 10, 30, 100, 1000, 10**5])
        xs.append((rng.randrange(0, n + 1), n))
    cases = []
    for x, n in xs:
        conf = rng.choice(CONFIDENCES)
        alpha = 1 - conf
        wlo, whi = wilson(x, n, alpha)
        jlo, jhi = proportion_confint(x, n, alpha=alpha, method="jeffreys")
        cases.append({"x": x, "n": n, "confidence": conf,
                      "wilson": [float(wlo), float(whi)],
                      "jeffreys": [float(jlo), float(jhi)]})
    return cases


def newcombe_cases():
    out = []
    for x, n, lo, hi in NEWCOMBE_1998:
        slo, shi = proportion_confint(x, n, alpha=0.05, method="wilson")
        # Cross-check the remembered values before anything relies on them.
        assert round(slo, 4) == lo and round(shi, 4) == hi, (x, n, slo, shi)
        out.append({"x": x, "n": n, "remembered": [lo, hi],
                    "statsmodels_wilson": [float(slo), float(shi)]})
    return out


def newcombe_diff_cases():
    out = []
    for x1, n1, x2, n2, lo, hi in NEWCOMBE_1998_DIFF:
        slo, shi = confint_proportions_2indep(x1, n1, x2, n2, method="newcomb",
                                              compare="diff", alpha=0.05)
        assert round(slo, 4) == lo and round(shi, 4) == hi, (x1, n1, x2, n2, slo, shi)
        out.append({"x1": x1, "n1": n1, "x2": x2, "n2": n2, "remembered": [lo, hi],
                    "statsmodels_newcomb": [float(slo), float(shi)]})
    return out


def homogeneity_cases(rng):
    vecs = [([10, 20, 30], [10, 20, 30]), ([12, 5], [3, 9]), ([0, 7, 3], [0, 2, 9]),
            ([5, 0], [3, 0]), ([1, 0, 0, 0], [0, 0, 0, 1]), ([1000000, 3], [999000, 40]),
            ([40, 1], [38, 2]), ([0, 0, 6, 0, 1], [2, 0, 0, 0, 4])]
    for _ in range(40):
        k = rng.randrange(2, 13)
        scale = rng.choice([5, 50, 5000, 10**6])
        a = [rng.choice([0, rng.randrange(scale)]) for _ in range(k)]
        b = [rng.choice([0, rng.randrange(scale)]) for _ in range(k)]
        if sum(a) == 0:
            a[0] = 1
        if sum(b) == 0:
            b[-1] = 1
        vecs.append((a, b))
    cases = []
    for a, b in vecs:
        keep = [i for i in range(len(a)) if a[i] or b[i]]
        table = np.array([[a[i] for i in keep], [b[i] for i in keep]], dtype=np.int64)
        chi = chi2_contingency(table, correction=False)
        g = chi2_contingency(table, correction=False, lambda_="log-likelihood")
        cases.append({
            "a": a, "b": b,
            "chi_square": {"statistic": float(chi[0]), "p": float(chi[1]), "df": int(chi[2])},
            "g": {"statistic": float(g[0]), "p": float(g[1]), "df": int(g[2])},
        })
    return cases


def js_cases(rng):
    pairs = [([1, 0], [0, 1]), ([0.5, 0.5], [0.5, 0.5]), ([1, 2, 3], [2, 4, 6]),
             ([1, 2, 3], [3, 2, 1]), ([0, 0, 5], [1, 1, 1]), ([0.25, 0.75], [0.75, 0.25])]
    for _ in range(30):
        k = rng.randrange(2, 21)
        p = [rng.choice([0, rng.random()]) for _ in range(k)]
        q = [rng.choice([0, rng.random() * 100]) for _ in range(k)]
        p[0] += 0.1
        q[-1] += 0.1
        pairs.append((p, q))
    return [{"p": p, "q": q, "distance": float(jensenshannon(p, q))} for p, q in pairs]


def psi_cases(rng):
    pairs = [([100, 100], [100, 100]), ([90, 10], [50, 50]), ([10, 0, 5], [3, 4, 0]),
             ([9900, 100], [9000, 1000])]
    for _ in range(20):
        k = rng.randrange(2, 16)
        e = [rng.choice([0, rng.randrange(1, 1000)]) for _ in range(k)]
        a = [rng.choice([0, rng.randrange(1, 1000)]) for _ in range(k)]
        e[0] += 1
        a[-1] += 1
        pairs.append((e, a))
    cases = []
    for e, a in pairs:
        for eps in (1e-4, 1e-6):
            es = np.asarray(e, dtype=float) / sum(e)
            as_ = np.asarray(a, dtype=float) / sum(a)
            es = np.where(es == 0, eps, es)
            as_ = np.where(as_ == 0, eps, as_)
            psi = float(np.sum((as_ - es) * np.log(as_ / es)))
            cases.append({"expected": e, "actual": a, "epsilon": eps, "psi": psi})
    return cases


def two_proportion_cases(rng):
    quads = [(56, 70, 48, 80), (9, 10, 3, 10), (6, 7, 2, 7), (5, 56, 0, 29),
             (0, 10, 0, 20), (10, 10, 20, 20), (0, 10, 5, 10), (10, 10, 0, 10),
             (1, 1, 0, 1), (800, 1000, 880, 1000), (45, 50, 980, 1000)]
    for _ in range(40):
        n1 = rng.choice([5, 20, 100, 1000, 10**5])
        n2 = rng.choice([5, 20, 100, 1000, 10**5])
        quads.append((rng.randrange(n1 + 1), n1, rng.randrange(n2 + 1), n2))
    cases = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for x1, n1, x2, n2 in quads:
            conf = rng.choice(CONFIDENCES)
            alpha = 1 - conf
            lo, hi = confint_proportions_2indep(x1, n1, x2, n2, method="newcomb",
                                                compare="diff", alpha=alpha)
            z, p = proportions_ztest([x1, x2], [n1, n2], alternative="two-sided")
            _, p_less = proportions_ztest([x1, x2], [n1, n2], alternative="smaller")
            cases.append({"x1": x1, "n1": n1, "x2": x2, "n2": n2, "confidence": conf,
                          "lo": float(lo), "hi": float(hi), "diff": x1 / n1 - x2 / n2,
                          "z": num(z), "p": num(p), "p_less": num(p_less)})
    return cases


def bh_cases(rng):
    cases = [
        {"p": [0.01, 0.02, 0.03, 0.04, 0.05], "q": 0.05},
        {"p": [0.04, 0.001, 0.9, 0.03], "q": 0.05},
        {"p": [0.2, 0.2, 0.2], "q": 0.1},
        {"p": [0.0125, 0.025, 0.0375, 0.05], "q": 0.05},
        {"p": [], "q": 0.05},
    ]
    for _ in range(30):
        m = rng.randrange(1, 40)
        p = [rng.random() ** rng.choice([1, 3, 8]) for _ in range(m)]
        cases.append({"p": p, "q": rng.choice([0.01, 0.05, 0.1, 0.2])})
    for c in cases:
        if c["p"]:
            c["reject"] = [bool(r) for r in multipletests(c["p"], alpha=c["q"], method="fdr_bh")[0]]
        else:
            c["reject"] = []
    return cases


def write(name, doc):
    """Write doc as JSON with one line per top-level key and per list item,
    so that a change in one case shows up as a one-line diff."""
    doc["versions"] = versions()
    doc["generator"] = "windows/testdata/reference/gen.py"

    def dump(v):
        return json.dumps(v, sort_keys=True, separators=(",", ":"), allow_nan=False)

    lines = []
    for key in sorted(doc):
        v = doc[key]
        if isinstance(v, list) and v and isinstance(v[0], dict):
            body = ",\n".join(dump(item) for item in v)
            lines.append("%s:[\n%s\n]" % (dump(key), body))
        else:
            lines.append("%s:%s" % (dump(key), dump(v)))
    with open(os.path.join(OUTDIR, name), "w") as f:
        f.write("{\n" + ",\n".join(lines) + "\n}\n")


def main():
    warnings.simplefilter("ignore")  # zero_division and kappa warnings are expected
    rng = random.Random(SEED)
    write("metrics.json", {"seed": SEED, "cases": matrix_cases(rng)})
    write("digits.json", digits_case())
    write("stats.json", {
        "seed": SEED,
        "intervals": interval_cases(rng),
        "newcombe_1998": newcombe_cases(),
        "newcombe_1998_difference": newcombe_diff_cases(),
        "homogeneity": homogeneity_cases(rng),
        "jensen_shannon": js_cases(rng),
        "psi": psi_cases(rng),
        "two_proportion": two_proportion_cases(rng),
        "benjamini_hochberg": bh_cases(rng),
    })


if __name__ == "__main__":
    main()
