#!/usr/bin/python3
"""Write reference average run lengths of integer Bernoulli CUSUM charts.

Run from the repository root with Debian's interpreter:

    /usr/bin/python3 alerts/testdata/cusum/gen.py

It needs python3-numpy and writes arl.json next to this file, with the
numpy version that produced it. The output is deterministic, so CI can
re-run it and fail on any difference.

The chart: S starts at 0; each trial adds `bad` steps with probability q
and removes `good` steps otherwise, never going below 0; the run ends when
S reaches h. Its average run length from 0 solves (I - R) L = 1 over the
transient states 0 .. h-1, R holding the transition probabilities among
them (Brook & Evans 1972). Here the system is built dense and solved with
numpy.linalg.solve, independently of the banded elimination in
alerts/cusum.go.
"""

import json
import math
import os

import numpy as np

# (bad, good, h, q): integer weights, threshold in steps, probability of
# the bad outcome. The q values are the in-control and shifted failure
# rates of recall 0.9 -> 0.7, 0.8 -> 0.6, and the success rates of a
# prevalence 0.02 -> 0.04, with weights as alerts.DesignCUSUM rounds them.
CASES = [
    (1, 1, 10, 0.5),
    (1, 1, 12, 0.3),
    (13, 3, 60, 0.1),
    (13, 3, 60, 0.3),
    (13, 3, 95, 0.1),
    (17, 7, 80, 0.2),
    (17, 7, 80, 0.4),
    (67, 2, 700, 0.02),
    (67, 2, 700, 0.04),
]


def arl(bad, good, h, q):
    r = np.zeros((h, h))
    for i in range(h):
        if i + bad < h:
            r[i, i + bad] += q
        r[i, max(0, i - good)] += 1 - q
    return float(np.linalg.solve(np.eye(h) - r, np.ones(h))[0])


def main():
    out = {
        "versions": {"numpy": np.__version__},
        "cases": [
            {"bad": b, "good": g, "h": h, "q": q, "arl": arl(b, g, h, q)}
            for b, g, h, q in CASES
        ],
    }
    for c in out["cases"]:
        assert math.isfinite(c["arl"]) and c["arl"] > 0
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "arl.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
