#!/usr/bin/env python3
"""Outside references for `lineside evaluate` (used by tests/it/evaluate.rs).

  evaluate_reference.py figures EVAL.json
      Recompute from the JSON's `predictions` (truth, label, scores) with scikit-learn 1.9
      (accuracy_score, balanced_accuracy_score, precision_recall_fscore_support with
      labels=... and zero_division=0, confusion_matrix(labels=...), top_k_accuracy_score),
      statsmodels 0.15 (proportion_confint(method="beta"): Clopper-Pearson) and numpy (ECE over
      15 equal-width bins, bin i = (i/15, (i+1)/15] with 0 in the first, as Guo et al., 2017
      define it). Prints the largest absolute difference per figure as JSON.

  evaluate_reference.py stats CASES.json
      For [{"b":..,"c":..}] McNemar cases and [{"k":..,"n":..}] interval cases, print
      statsmodels' mcnemar(table, exact=True).pvalue and proportion_confint(k, n,
      alpha=0.05, method="beta").
"""

import json
import sys

import numpy as np
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    confusion_matrix,
    precision_recall_fscore_support,
    top_k_accuracy_score,
)
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.proportion import proportion_confint


def ece(top, right, bins=15):
    """ECE over equal-width right-closed bins of [0, 1], written from the formula."""
    top = np.clip(np.asarray(top, dtype=np.float64), 0.0, 1.0)
    right = np.asarray(right, dtype=np.float64)
    idx = np.clip(np.ceil(top * bins).astype(int) - 1, 0, bins - 1)
    total = 0.0
    for b in range(bins):
        m = idx == b
        if m.any():
            total += m.sum() / len(top) * abs(right[m].mean() - top[m].mean())
    return total


def figures(path):
    doc = json.load(open(path))
    labels = doc["confusion"]["labels"]
    preds = doc["predictions"]
    y_true = [labels.index(p["truth"]) for p in preds]
    y_pred = [labels.index(p["label"]) for p in preds]
    scores = np.array([p["scores"] for p in preds], dtype=np.float64)
    idx = list(range(len(labels)))
    diff = {}
    diff["accuracy"] = abs(doc["accuracy"] - accuracy_score(y_true, y_pred))
    diff["balanced_accuracy"] = abs(doc["balanced_accuracy"] - balanced_accuracy_score(y_true, y_pred))
    p, r, f, s = precision_recall_fscore_support(y_true, y_pred, labels=idx, zero_division=0)
    ours = doc["per_class"]
    diff["precision"] = max(abs(c["precision"] - v) for c, v in zip(ours, p))
    diff["recall"] = max(abs(c["recall"] - v) for c, v in zip(ours, r))
    diff["f1"] = max(abs(c["f1"] - v) for c, v in zip(ours, f))
    diff["support"] = max(abs(c["support"] - int(v)) for c, v in zip(ours, s))
    for avg, key in [("macro", "macro_avg"), ("weighted", "weighted_avg")]:
        ap, ar, af, _ = precision_recall_fscore_support(y_true, y_pred, labels=idx, zero_division=0, average=avg)
        a = doc[key]
        diff[key] = max(abs(a["precision"] - ap), abs(a["recall"] - ar), abs(a["f1"] - af))
    cm = confusion_matrix(y_true, y_pred, labels=idx)
    diff["confusion"] = float(np.abs(np.array(doc["confusion"]["matrix"]) - cm).max())
    for k in (2, 3):
        key = f"top_{k}"
        if k < len(labels):
            theirs = top_k_accuracy_score(y_true, scores, k=k, labels=idx)
            diff[key] = abs(doc["top_k"][key] - theirs)
        else:
            diff[key] = 0.0 if key not in doc["top_k"] else 1.0
    lo, hi = proportion_confint(sum(t == q for t, q in zip(y_true, y_pred)), len(y_true), alpha=0.05, method="beta")
    acc = doc["accuracy_interval"]
    diff["accuracy_interval"] = max(abs(acc["low"] - lo), abs(acc["high"] - hi))
    worst = 0.0
    for c, tp, n in zip(ours, np.diag(cm), cm.sum(axis=1)):
        if n > 0:
            lo, hi = proportion_confint(int(tp), int(n), alpha=0.05, method="beta")
            worst = max(worst, abs(c["recall_interval"][0] - lo), abs(c["recall_interval"][1] - hi))
    diff["recall_interval"] = worst
    top = [p["score"] for p in preds]
    right = [t == q for t, q in zip(y_true, y_pred)]
    diff["ece"] = abs(doc["ece"] - ece(top, right)) if doc["ece"] is not None else None
    print(json.dumps(diff))


def stats(path):
    cases = json.load(open(path))
    out = {"mcnemar": [], "interval": []}
    for c in cases["mcnemar"]:
        # Rows: the first model right / wrong; columns: the second right / wrong. Only the
        # off-diagonal (discordant) cells enter the exact test.
        table = [[5, c["b"]], [c["c"], 7]]
        out["mcnemar"].append(float(mcnemar(table, exact=True).pvalue))
    for c in cases["interval"]:
        lo, hi = proportion_confint(c["k"], c["n"], alpha=0.05, method="beta")
        out["interval"].append([float(np.nan_to_num(lo)), float(np.nan_to_num(hi, nan=1.0))])
    print(json.dumps(out))


if __name__ == "__main__":
    {"figures": figures, "stats": stats}[sys.argv[1]](sys.argv[2])
