#!/usr/bin/python3
"""Write the reference values the alert rule tests compare against.

Run from the repository root with Debian's interpreter:

    /usr/bin/python3 alerts/testdata/gen.py

It needs python3-scipy, python3-statsmodels and python3-numpy and writes
golden.json next to this file, with the library versions that produced it.
The output is deterministic, so CI can re-run it and fail on
`git diff --exit-code alerts/testdata`.

Each case sits at an edge of a rule's decision: the count just inside and
just outside a floor or ceiling, the p-value just below and just above the
level. The boundaries are found here by searching with the libraries, so
the Go tests check both the figures and the decision.

Conventions bridged here:

* Floors and ceilings use the two-sided interval at the rule's confidence
  (statsmodels proportion_confint); a floor fires when the upper bound is
  below it, a ceiling when the lower bound is above it.
* A drop without a margin is Fisher's exact test, one-sided
  (scipy.stats.fisher_exact, alternative='less'), at level 1 - confidence.
  A confusion rise is the same with alternative='greater'.
* With a margin, the test is Farrington & Manning's (1990) score test: the
  variance uses the maximum-likelihood proportions restricted to the null
  difference. statsmodels 0.13.5 test_proportions_2indep(method='score',
  compare='diff') is not used: it always multiplies the variance by
  n/(n-1), ignoring correction=False, and its closed-form restricted
  estimates do not maximise the likelihood (for 160/200 against 180/200 at
  -0.05 its prop1_null 0.82765 has log-likelihood -166.10423, below the
  -166.10293 at 0.82855). The restricted estimate is found here by
  solving the likelihood equation with scipy.optimize.brentq.
* Shift tests: chi2_contingency(correction=False) and
  chi2_contingency(lambda_='log-likelihood'), after pooling sparse classes
  as classwatch does (see pool_sparse below); PSI from numpy.
"""

import json
import math
import os
import platform

import numpy as np
import scipy
import statsmodels
from scipy.optimize import brentq
from scipy.stats import chi2_contingency, fisher_exact, hypergeom, norm
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import (
    confint_proportions_2indep,
    proportion_confint,
)

HERE = os.path.dirname(os.path.abspath(__file__))


def interval(x, n, conf, method):
    lo, hi = proportion_confint(x, n, alpha=1 - conf, method=method)
    return [float(lo), float(hi)]


def floor_case(n, floor, conf, method="wilson"):
    """The largest x whose upper bound lies below floor, and x + 1."""
    fire = max(x for x in range(n + 1) if interval(x, n, conf, method)[1] < floor)
    return {
        "n": n, "threshold": floor, "confidence": conf, "interval": method,
        "fire": {"x": fire, "interval": interval(fire, n, conf, method)},
        "hold": {"x": fire + 1, "interval": interval(fire + 1, n, conf, method)},
    }


def ceiling_case(n, ceiling, conf, method="wilson"):
    """The smallest x whose lower bound lies above ceiling, and x - 1."""
    fire = min(x for x in range(n + 1) if interval(x, n, conf, method)[0] > ceiling)
    return {
        "n": n, "threshold": ceiling, "confidence": conf, "interval": method,
        "fire": {"x": fire, "interval": interval(fire, n, conf, method)},
        "hold": {"x": fire - 1, "interval": interval(fire - 1, n, conf, method)},
    }


def restricted_mle(x1, n1, x2, n2, value):
    """Maximum-likelihood p1 under the constraint p1 - p2 = value: the root
    of the binomial log-likelihood's derivative, which falls strictly on
    the feasible interval (the log-likelihood is concave there), found with
    scipy.optimize.brentq."""
    def score(p):
        q = p - value
        return x1 / p - (n1 - x1) / (1 - p) + x2 / q - (n2 - x2) / (1 - q)
    lo = max(0.0, value) + 1e-12
    hi = min(1.0, 1 + value) - 1e-12
    return float(brentq(score, lo, hi, xtol=1e-16, rtol=1e-15, maxiter=500))


def fm_pvalue(x1, n1, x2, n2, value, alternative):
    """Farrington-Manning score test of p1 - p2 = value: restricted
    estimates by numerical maximisation, variance without n/(n-1)."""
    p1 = restricted_mle(x1, n1, x2, n2, value)
    p2 = p1 - value
    var = p1 * (1 - p1) / n1 + p2 * (1 - p2) / n2
    z = (x1 / n1 - x2 / n2 - value) / math.sqrt(var)
    return float(norm.cdf(z) if alternative == "smaller" else norm.sf(z))


def fisher(x1, n1, x2, n2, lower):
    """One-sided p-value of Fisher's exact test (scipy.stats.fisher_exact),
    checked against the hypergeometric tail it is (scipy.stats.hypergeom)."""
    alternative = "less" if lower else "greater"
    p = fisher_exact([[x1, n1 - x1], [x2, n2 - x2]], alternative=alternative)[1]
    dist = hypergeom(n1 + n2, x1 + x2, n1)
    tail = dist.cdf(x1) if lower else dist.sf(x1 - 1)
    assert math.isclose(p, tail, rel_tol=1e-9), (x1, n1, x2, n2)
    return float(p)


def pvalue(x1, n1, x2, n2, margin, lower):
    """One-sided p-value of 'current worse than reference by more than
    margin'; lower: worse is lower (drop), else higher (confusion rise)."""
    if margin == 0:
        return fisher(x1, n1, x2, n2, lower)
    alternative = "smaller" if lower else "larger"
    return fm_pvalue(x1, n1, x2, n2, -margin if lower else margin, alternative)


def comparison(x1, n1, x2, n2, margin, conf, lower):
    lo, hi = confint_proportions_2indep(x1, n1, x2, n2, method="newcomb",
                                        compare="diff", alpha=1 - conf)
    return {
        "x": x1, "p": pvalue(x1, n1, x2, n2, margin, lower),
        "interval": interval(x1, n1, conf, "wilson"),
        "difference": x1 / n1 - x2 / n2,
        "difference_interval": [float(lo), float(hi)],
    }


def edge_case(n1, x2, n2, margin, conf, lower):
    """The x1 just inside the one-sided level and its neighbour just outside."""
    alpha = 1 - conf
    xs = range(1, n1)  # the likelihood needs 0 < p < 1
    if lower:
        fire = max(x for x in xs if pvalue(x, n1, x2, n2, margin, True) <= alpha)
        hold = fire + 1
    else:
        fire = min(x for x in xs if pvalue(x, n1, x2, n2, margin, False) <= alpha)
        hold = fire - 1
    return {
        "n1": n1, "x2": x2, "n2": n2, "margin": margin, "confidence": conf,
        "fire": comparison(fire, n1, x2, n2, margin, conf, lower),
        "hold": comparison(hold, n1, x2, n2, margin, conf, lower),
    }


def pool_sparse(a, b, min_expected=5):
    """classwatch's pooling: classes whose expected count in the smaller
    sample falls below min_expected are merged into one; if that pool is
    itself that sparse, it is merged into the largest remaining class."""
    ta, tb = sum(a), sum(b)
    n = ta + tb

    def sparse(x, y):
        return (x + y) * min(ta, tb) / n < min_expected

    pa, pb, sa, sb, pooled = [], [], 0, 0, False
    for x, y in zip(a, b):
        if x + y > 0 and sparse(x, y):
            sa, sb, pooled = sa + x, sb + y, True
        else:
            pa.append(x)
            pb.append(y)
    if not pooled:
        return pa, pb
    if not sparse(sa, sb) or not pa:
        return pa + [sa], pb + [sb]
    big = max(range(len(pa)), key=lambda i: (pa[i] + pb[i], -i))
    pa[big] += sa
    pb[big] += sb
    return pa, pb


def homogeneity(a, b, lambda_=None):
    pa, pb = pool_sparse(a, b)
    keep = [i for i in range(len(pa)) if pa[i] + pb[i] > 0]
    table = np.array([[pa[i] for i in keep], [pb[i] for i in keep]])
    stat, p, df, _ = chi2_contingency(table, correction=False, lambda_=lambda_)
    return {"statistic": float(stat), "p": float(p), "df": int(df)}


def psi(expected, actual, eps=1e-4):
    e = np.array(expected, dtype=float) / sum(expected)
    a = np.array(actual, dtype=float) / sum(actual)
    e[e == 0] = eps
    a[a == 0] = eps
    return float(np.sum((a - e) * np.log(a / e)))


def shift_case(cur, ref, conf):
    return {
        "current": cur, "reference": ref, "confidence": conf,
        "chi_square": homogeneity(cur, ref),
        "g_test": homogeneity(cur, ref, "log-likelihood"),
        "psi": psi(ref, cur),
    }


def shift_edge(ref, base, move, conf):
    """Move counts from the last class to the first, one at a time, until
    the chi-square p-value falls to the level; return both sides."""
    alpha = 1 - conf
    prev = None
    for d in range(base[-1] + 1):
        cur = list(base)
        cur[0] += d * move
        cur[-1] -= d * move
        if homogeneity(cur, ref)["p"] <= alpha:
            return {"fire": shift_case(cur, ref, conf), "hold": shift_case(prev, ref, conf)}
        prev = cur
    raise ValueError("no edge found")


def bh_case(conf):
    """Three classes of one model whose one-sided p-values straddle the
    Benjamini-Hochberg thresholds: the second lies below the level q but
    above its rank's threshold 2/3 * q, so BH keeps it where a test per
    class would fire."""
    n2, x2 = 1000, 900
    q = 1 - conf
    bands = [(0.001, q / 3), (2 * q / 3 + 0.002, q - 0.002), (0.2, 0.4)]
    rows = []
    for lo, hi in bands:
        x1, n1 = next((x, n) for n in range(100, 400) for x in range(n // 2, n)
                      if lo < pvalue(x, n, x2, n2, 0, True) < hi)
        rows.append({"x1": x1, "n1": n1, "x2": x2, "n2": n2,
                     "p": pvalue(x1, n1, x2, n2, 0, True)})
    reject = multipletests([r["p"] for r in rows], alpha=q, method="fdr_bh")[0]
    return {"confidence": conf, "classes": rows, "reject": [bool(r) for r in reject]}


def main():
    out = {
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "statsmodels": statsmodels.__version__,
        },
        # min_count 30 in the tests: n=29 must stay unknown, n=30 fire.
        "floor": [
            floor_case(29, 0.8, 0.95),
            floor_case(30, 0.8, 0.95),
            floor_case(100, 0.8, 0.95),
            floor_case(1000, 0.95, 0.90),
            floor_case(50, 0.9, 0.95, "jeffreys"),
        ],
        "ceiling": [
            ceiling_case(1000, 0.05, 0.95),
            ceiling_case(200, 0.5, 0.99),
        ],
        "drop": [
            edge_case(100, 900, 1000, 0, 0.95, True),
            edge_case(40, 900, 1000, 0, 0.95, True),
            edge_case(200, 450, 500, 0.05, 0.95, True),
        ],
        "rise": [
            edge_case(100, 50, 1000, 0, 0.95, False),
            edge_case(300, 50, 1000, 0.02, 0.95, False),
        ],
        "bh": bh_case(0.95),
        "shift": [
            shift_edge([600, 300, 100], [60, 30, 10], 1, 0.95),
        ],
        "pooled_shift": shift_case([100, 60, 38, 2], [500, 300, 197, 3], 0.95),
    }
    with open(os.path.join(HERE, "golden.json"), "w") as f:
        json.dump(out, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
