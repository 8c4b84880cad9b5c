#!/usr/bin/python3
"""Check a classwatch scrape against scikit-learn and statsmodels.

Usage: check.py SCRAPE.prom

Reads the counts of every (model, window) in a Prometheus text exposition
(classwatch_confusion, classwatch_window_class_predictions,
classwatch_window_predictions), recomputes every ratio and Wilson interval
with the reference libraries, and checks that exactly the defined ratios
are present and equal to 1e-12. Exits non-zero on any difference.

MCC and kappa are checked against matthews_corrcoef and cohen_kappa_score.

The rules it checks are README.md "Metric definitions": a ratio with a zero
denominator is absent. Per-class F1 and macro F1 follow classwatch's stated
convention, equal to precision_recall_fscore_support(zero_division=0) and
f1_score(average="macro", labels=<classes on either axis>, zero_division=0).
"""

import re
import sys
import warnings
from collections import defaultdict

import numpy as np
import sklearn
import statsmodels
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    cohen_kappa_score,
    f1_score,
    matthews_corrcoef,
    multilabel_confusion_matrix,
    precision_recall_fscore_support,
)
from statsmodels.stats.proportion import proportion_confint

CONFIDENCE = 0.95
# Expected when a class is predicted but never actual in a window.
warnings.filterwarnings('ignore', message='y_pred contains classes not in y_true')
TOL = 1e-12

LINE = re.compile(r'^([a-zA-Z_:][a-zA-Z0-9_:]*)\{(.*)\} (\S+)$')
LABEL = re.compile(r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"')


def parse(path):
    series = {}
    with open(path) as f:
        for line in f:
            if line.startswith('#') or not line.strip():
                continue
            m = LINE.match(line.strip())
            if not m:
                sys.exit(f'cannot parse: {line!r}')
            labels = tuple(sorted(LABEL.findall(m.group(2))))
            series[(m.group(1), labels)] = float(m.group(3))
    return series


def key(name, **labels):
    return (name, tuple(sorted(labels.items())))


def main(path):
    got = parse(path)
    # Counts per (model, window).
    cells = defaultdict(dict)
    class_predictions = defaultdict(dict)
    predictions = {}
    for (name, labels), v in got.items():
        lab = dict(labels)
        if name == 'classwatch_confusion':
            cells[(lab['model'], lab['window'])][(lab['actual'], lab['predicted'])] = int(v)
        elif name == 'classwatch_window_class_predictions':
            class_predictions[(lab['model'], lab['window'])][lab['class']] = int(v)
        elif name == 'classwatch_window_predictions':
            predictions[(lab['model'], lab['window'])] = int(v)

    want = {}
    for (model, window), cm in cells.items():
        classes = sorted({a for a, _ in cm} | {p for _, p in cm})
        y_true, y_pred = [], []
        for (a, p), n in cm.items():
            y_true += [a] * n
            y_pred += [p] * n
        n = len(y_true)
        total = predictions[(model, window)]
        w = dict(model=model, window=window)
        want[key('classwatch_window_labeled', **w)] = n
        if total > 0:
            want[key('classwatch_label_coverage_ratio', **w)] = n / total
        if n > 0:
            want[key('classwatch_accuracy_ratio', **w)] = accuracy_score(y_true, y_pred)
            want[key('classwatch_balanced_accuracy_ratio', **w)] = balanced_accuracy_score(y_true, y_pred)
            present = sorted(set(y_true) | set(y_pred))
            want[key('classwatch_macro_f1_ratio', **w)] = f1_score(
                y_true, y_pred, average='macro', labels=present, zero_division=0)
            # classwatch leaves MCC out where scikit-learn returns 0 for
            # a single actual or a single predicted class, and kappa where
            # every label is one and the same class (NaN there).
            if len(set(y_true)) > 1 and len(set(y_pred)) > 1:
                want[key('classwatch_matthews_correlation', **w)] = matthews_corrcoef(y_true, y_pred)
            if len(set(y_true) | set(y_pred)) > 1:
                want[key('classwatch_cohen_kappa', **w)] = cohen_kappa_score(y_true, y_pred)
            prec, rec, f1, support = precision_recall_fscore_support(
                y_true, y_pred, labels=classes, average=None, zero_division=0)
            mcm = multilabel_confusion_matrix(y_true, y_pred, labels=classes)
        for i, c in enumerate(classes):
            wc = dict(model=model, window=window, **{'class': c})
            if total > 0:
                want[key('classwatch_predicted_ratio', **wc)] = class_predictions[(model, window)][c] / total
            if n == 0:
                continue
            (tn, fp), (fn, tp) = mcm[i]
            want[key('classwatch_prevalence_ratio', **wc)] = support[i] / n
            if tp + fn > 0:
                want[key('classwatch_recall_ratio', **wc)] = rec[i]
                lo, hi = proportion_confint(tp, tp + fn, alpha=1 - CONFIDENCE, method='wilson')
                want[key('classwatch_recall_lower_ratio', **wc)] = lo
                want[key('classwatch_recall_upper_ratio', **wc)] = hi
            if tp + fp > 0:
                want[key('classwatch_precision_ratio', **wc)] = prec[i]
            if tn + fp > 0:
                want[key('classwatch_specificity_ratio', **wc)] = tn / (tn + fp)
            if tp + fp + fn > 0:
                want[key('classwatch_f1_ratio', **wc)] = f1[i]

    checked = {k for k in got if k[0] in {w[0] for w in want}}
    bad = 0
    for k in sorted(set(want) | checked):
        if k not in got:
            print(f'missing {k}: want {want[k]}')
            bad += 1
        elif k not in want:
            print(f'unexpected {k} = {got[k]}: undefined by the reference')
            bad += 1
        elif abs(got[k] - float(want[k])) > TOL:
            print(f'{k}: got {got[k]!r}, reference {float(want[k])!r}')
            bad += 1
    print(f'{len(want)} figures checked with scikit-learn {sklearn.__version__}, '
          f'statsmodels {statsmodels.__version__}, numpy {np.__version__}: {bad} differences')
    return 1 if bad else 0


if __name__ == '__main__':
    sys.exit(main(sys.argv[1]))
