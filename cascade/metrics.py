"""Evaluation metrics for a calibrated multi-class URL model.

Accuracy, F1, ROC AUC and TPR at an FPR budget are thin wrappers over ``sklearn.metrics``
(the reference the tests check against), adding this project's input checks and its
conventions for undefined cases (NaN rather than an exception or a silent 0). The weighted
top-label ECE, the reliability table, coverage at a precision target and the risk-coverage
curve have no ``sklearn.metrics`` counterpart and are written here in numpy.

Every metric takes class indices ``y_true`` of shape (n,) and, where it needs scores,
calibrated probabilities ``proba`` of shape (n, k) whose rows sum to 1. An optional
``sample_weight`` of shape (n,) (lookup counts) turns each metric into its "weighted by
lookup volume" version. A row with weight 0 is treated exactly as if it were absent, so a
weighted metric never depends on URLs nobody looked up.

The top-label prediction of a row is ``argmax(proba)`` (the lowest class index wins a tie)
and its confidence is ``max(proba)``.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from sklearn.metrics import accuracy_score, f1_score, roc_auc_score, roc_curve

from cascade._validation import (
    check_labels,
    check_n_classes,
    check_proba,
    check_weight,
)

__all__ = [
    "ReliabilityTable",
    "accuracy",
    "bootstrap_intervals",
    "bootstrap_weights",
    "coverage_at_precision",
    "expected_calibration_error",
    "f1_per_class",
    "macro_f1",
    "reliability_table",
    "risk_coverage_curve",
    "roc_auc_one_vs_rest",
    "summarize",
    "tpr_at_fpr",
]


def _keep_weighted(w: np.ndarray, *arrays: np.ndarray) -> tuple[np.ndarray, ...]:
    """Drop rows of weight 0 so they behave exactly like absent rows."""
    keep = w > 0
    if keep.all():
        return (w, *arrays)
    return (w[keep], *(a[keep] for a in arrays))


def _prepare_proba(
    y_true: npt.ArrayLike, proba: npt.ArrayLike, sample_weight: npt.ArrayLike | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Validate (y_true, proba, sample_weight) and return (y, p, w) with zero-weight rows gone."""
    y = check_labels(y_true, "y_true")
    p = check_proba(proba, y.shape[0])
    if y.max() >= p.shape[1]:
        raise ValueError(
            f"y_true holds class index {y.max()} but proba has only {p.shape[1]} columns"
        )
    w = check_weight(sample_weight, y.shape[0])
    w, y, p = _keep_weighted(w, y, p)
    return y, p, w


def _prepare_pred(
    y_true: npt.ArrayLike,
    y_pred: npt.ArrayLike,
    n_classes: int | None,
    sample_weight: npt.ArrayLike | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Validate (y_true, y_pred, sample_weight) and return (y, yp, w) with zero-weight rows gone."""
    y = check_labels(y_true, "y_true", n_classes)
    yp = check_labels(y_pred, "y_pred", n_classes)
    if yp.shape[0] != y.shape[0]:
        raise ValueError(f"y_pred has {yp.shape[0]} entries but y_true has {y.shape[0]}")
    w = check_weight(sample_weight, y.shape[0])
    w, y, yp = _keep_weighted(w, y, yp)
    return y, yp, w


def _top_label(y: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Top-label confidence and whether the top label is right, per row."""
    pred = p.argmax(axis=1)
    return p.max(axis=1), pred == y


# --------------------------------------------------------------- hard-label metrics


def accuracy(
    y_true: npt.ArrayLike, y_pred: npt.ArrayLike, sample_weight: npt.ArrayLike | None = None
) -> float:
    """Fraction (or weight fraction) of rows whose predicted class is the true one."""
    y, yp, w = _prepare_pred(y_true, y_pred, None, sample_weight)
    return float(accuracy_score(y, yp, sample_weight=w))


def _present_classes(y: np.ndarray, yp: np.ndarray, k: int) -> np.ndarray:
    """Whether each of the k classes occurs in y or yp (zero-weight rows already gone)."""
    present = np.zeros(k, dtype=bool)
    present[y] = True
    present[yp] = True
    return present


def f1_per_class(
    y_true: npt.ArrayLike,
    y_pred: npt.ArrayLike,
    n_classes: int,
    sample_weight: npt.ArrayLike | None = None,
) -> np.ndarray:
    """Per-class F1 (k,); NaN for a class that appears in neither y_true nor y_pred.

    A class that appears is scored 2TP / (2TP + FP + FN) by ``sklearn.metrics.f1_score``,
    which is 0 when it is never predicted right, so the undefined case is kept apart from
    the merely bad one (sklearn would score both 0).
    """
    k = check_n_classes(n_classes)
    y, yp, w = _prepare_pred(y_true, y_pred, k, sample_weight)
    # zero_division only reaches absent classes (a present one has positive weight in its
    # row or column of the confusion matrix), and those become NaN below.
    out = f1_score(
        y, yp, labels=np.arange(k), average=None, sample_weight=w, zero_division=0.0
    ).astype(np.float64)
    out[~_present_classes(y, yp, k)] = np.nan
    return out


def macro_f1(
    y_true: npt.ArrayLike,
    y_pred: npt.ArrayLike,
    n_classes: int,
    sample_weight: npt.ArrayLike | None = None,
) -> float:
    """Unweighted mean of per-class F1 over the classes present in y_true or y_pred.

    Classes absent from both are left out rather than scored 0, so the figure does not
    move when the taxonomy grows a category the test set never touches.
    """
    k = check_n_classes(n_classes)
    y, yp, w = _prepare_pred(y_true, y_pred, k, sample_weight)
    labels = np.flatnonzero(_present_classes(y, yp, k))
    return float(
        f1_score(y, yp, labels=labels, average="macro", sample_weight=w, zero_division=0.0)
    )


# ------------------------------------------------------------------- ranking metrics


def _one_vs_rest_defined(positive: np.ndarray, w: np.ndarray) -> bool:
    """Class has positive weight on both sides, so its ROC curve exists (else sklearn raises)."""
    return bool(w[positive].sum() > 0 and w[~positive].sum() > 0)


def roc_auc_one_vs_rest(
    y_true: npt.ArrayLike, proba: npt.ArrayLike, sample_weight: npt.ArrayLike | None = None
) -> np.ndarray:
    """Per-class ROC AUC (k,), class c against the rest scored by ``proba[:, c]``.

    Each column is ``sklearn.metrics.roc_auc_score`` on ``y_true == c`` (trapezoid area,
    ties counting one half). NaN for a class with no positives or no negatives, where
    sklearn raises: one undefined class must not sink the other figures.
    """
    y, p, w = _prepare_proba(y_true, proba, sample_weight)
    k = p.shape[1]
    out = np.full(k, np.nan)
    for c in range(k):
        positive = y == c
        if _one_vs_rest_defined(positive, w):
            out[c] = roc_auc_score(positive, p[:, c], sample_weight=w)
    return out


def tpr_at_fpr(
    y_true: npt.ArrayLike,
    proba: npt.ArrayLike,
    max_fpr: float,
    sample_weight: npt.ArrayLike | None = None,
) -> np.ndarray:
    """Per-class best true-positive rate (k,) at a false-positive budget, one vs rest.

    Definition: for class c, each threshold t flags the rows with ``proba[:, c] >= t``;
    over all thresholds (the distinct scores, plus one above them all that flags nothing)
    whose FPR is <= ``max_fpr``, return the highest TPR. These are the points of
    ``sklearn.metrics.roc_curve(drop_intermediate=False)``; the step function is read with
    no interpolation between points, so the answer is always reachable by a real threshold.
    NaN for a class with no positives or no negatives.
    """
    max_fpr = float(max_fpr)
    if not 0.0 <= max_fpr <= 1.0:
        raise ValueError(f"max_fpr must lie in [0, 1], got {max_fpr}")
    y, p, w = _prepare_proba(y_true, proba, sample_weight)
    k = p.shape[1]
    out = np.full(k, np.nan)
    for c in range(k):
        positive = y == c
        if not _one_vs_rest_defined(positive, w):
            continue
        # Every point is kept: dropping collinear ones could lose the best allowed point.
        fpr, tpr, _ = roc_curve(positive, p[:, c], sample_weight=w, drop_intermediate=False)
        # The curve starts at the flag-nothing point (0, 0), so some point always fits.
        out[c] = float(tpr[fpr <= max_fpr].max())
    return out


# --------------------------------------------------------------------- calibration


@dataclass(frozen=True, eq=False)
class ReliabilityTable:
    """Per-bin top-label calibration data; NaN confidence/accuracy marks an empty bin."""

    lo: np.ndarray  #: lower bin edge (exclusive, except the first bin also takes 0)
    hi: np.ndarray  #: upper bin edge (inclusive)
    count: np.ndarray  #: rows in the bin (rows of weight 0 are not counted)
    weight: np.ndarray  #: total sample weight in the bin (equals count when unweighted)
    mean_confidence: np.ndarray  #: weighted mean top-label confidence
    accuracy: np.ndarray  #: weighted fraction of rows whose top label is right

    def to_rows(self) -> list[dict[str, float | int | None]]:
        """One JSON-ready dict per bin, NaN written as None."""
        return [
            {
                "lo": float(self.lo[i]),
                "hi": float(self.hi[i]),
                "count": int(self.count[i]),
                "weight": float(self.weight[i]),
                "mean_confidence": _json_float(self.mean_confidence[i]),
                "accuracy": _json_float(self.accuracy[i]),
            }
            for i in range(self.lo.shape[0])
        ]


def _bin_edges(n_bins: int) -> np.ndarray:
    if isinstance(n_bins, bool) or not isinstance(n_bins, int | np.integer) or n_bins < 1:
        raise ValueError(f"n_bins must be a positive int, got {n_bins!r}")
    # i / n rather than linspace, so an edge is the double nearest i/n exactly.
    return np.arange(int(n_bins) + 1) / int(n_bins)


def _bin_indices(conf: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Bin of each confidence for bins (lo, hi]; 0 joins the first bin, >1 the last."""
    idx = np.searchsorted(edges, conf, side="left") - 1
    return np.clip(idx, 0, edges.shape[0] - 2)


def reliability_table(
    y_true: npt.ArrayLike,
    proba: npt.ArrayLike,
    n_bins: int = 15,
    sample_weight: npt.ArrayLike | None = None,
) -> ReliabilityTable:
    """Bin rows by top-label confidence into equal-width bins over [0, 1].

    Bins are (0, 1/n], (1/n, 2/n], ..., ((n-1)/n, 1]; a confidence of exactly 0 goes in
    the first bin. The table feeds both the ECE and reliability diagrams.
    """
    edges = _bin_edges(n_bins)
    y, p, w = _prepare_proba(y_true, proba, sample_weight)
    conf, correct = _top_label(y, p)
    nb = edges.shape[0] - 1
    idx = _bin_indices(conf, edges)
    count = np.bincount(idx, minlength=nb)
    weight = np.bincount(idx, weights=w, minlength=nb)
    conf_sum = np.bincount(idx, weights=w * conf, minlength=nb)
    ok_sum = np.bincount(idx, weights=w * correct, minlength=nb)
    filled = weight > 0
    mean_conf = np.full(nb, np.nan)
    acc = np.full(nb, np.nan)
    mean_conf[filled] = conf_sum[filled] / weight[filled]
    acc[filled] = ok_sum[filled] / weight[filled]
    return ReliabilityTable(
        lo=edges[:-1].copy(),
        hi=edges[1:].copy(),
        count=count,
        weight=weight,
        mean_confidence=mean_conf,
        accuracy=acc,
    )


def expected_calibration_error(
    y_true: npt.ArrayLike,
    proba: npt.ArrayLike,
    n_bins: int = 15,
    sample_weight: npt.ArrayLike | None = None,
) -> float:
    """Top-label ECE: bin-weight-averaged |accuracy - mean confidence| over equal-width bins.

    Bins are those of :func:`reliability_table`; each bin counts in proportion to its
    share of the rows (or of the sample weight).
    """
    table = reliability_table(y_true, proba, n_bins, sample_weight)
    filled = table.weight > 0
    gaps = np.abs(table.accuracy[filled] - table.mean_confidence[filled])
    return float(np.sum(table.weight[filled] * gaps) / np.sum(table.weight))


# ------------------------------------------------------------ selective prediction


def _confidence_prefixes(
    conf: np.ndarray, correct: np.ndarray, w: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each distinct confidence t, high to low: t, weight with conf >= t, right weight.

    Rows tied at one confidence always enter together: a threshold cannot split them.
    """
    order = np.argsort(-conf, kind="stable")
    c = conf[order]
    cum_w = np.cumsum(w[order])
    cum_ok = np.cumsum(w[order] * correct[order])
    ends = np.append(np.flatnonzero(c[1:] != c[:-1]), c.shape[0] - 1)
    return c[ends], cum_w[ends], cum_ok[ends]


def coverage_at_precision(
    y_true: npt.ArrayLike,
    proba: npt.ArrayLike,
    target: float,
    sample_weight: npt.ArrayLike | None = None,
) -> tuple[float, float]:
    """Largest share of rows the model can answer alone at a top-label accuracy >= target.

    Rows are taken in decreasing top-label confidence, ties together. Among all such
    prefixes (not only the first run of good ones) the largest whose accuracy reaches
    ``target`` wins. Returns ``(coverage, threshold)``: answer rows with confidence >=
    threshold. When no prefix qualifies, returns ``(0.0, inf)``: answer nothing.
    """
    target = float(target)
    if not 0.0 <= target <= 1.0:
        raise ValueError(f"target must lie in [0, 1], got {target}")
    y, p, w = _prepare_proba(y_true, proba, sample_weight)
    conf, correct = _top_label(y, p)
    thresholds, cum_w, cum_ok = _confidence_prefixes(conf, correct, w)
    good = np.flatnonzero(cum_ok / cum_w >= target)
    if good.size == 0:
        return 0.0, math.inf
    j = int(good[-1])
    return float(cum_w[j] / cum_w[-1]), float(thresholds[j])


def risk_coverage_curve(
    y_true: npt.ArrayLike, proba: npt.ArrayLike, sample_weight: npt.ArrayLike | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Coverage and risk (top-label error rate among answered rows) per confidence threshold.

    One point per distinct confidence, from the most confident rows alone to all rows
    (coverage 1), so coverage strictly increases along the arrays.
    """
    y, p, w = _prepare_proba(y_true, proba, sample_weight)
    conf, correct = _top_label(y, p)
    _, cum_w, cum_ok = _confidence_prefixes(conf, correct, w)
    return cum_w / cum_w[-1], 1.0 - cum_ok / cum_w


# ------------------------------------------------------------------------- summary


def _json_float(x: float) -> float | None:
    """A plain float, or None for NaN/inf (which JSON cannot carry)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _mean_defined(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else None


def _headline(
    y: np.ndarray,
    p: np.ndarray,
    w: np.ndarray | None,
    precision_target: float,
) -> tuple[dict[str, Any], np.ndarray]:
    """The figures reported both per URL and per lookup; also returns the AUCs."""
    k = p.shape[1]
    pred = p.argmax(axis=1)
    aucs = roc_auc_one_vs_rest(y, p, w)
    coverage, threshold = coverage_at_precision(y, p, precision_target, w)
    figures: dict[str, Any] = {
        "accuracy": accuracy(y, pred, w),
        "macro_f1": macro_f1(y, pred, k, w),
        "ece_15": expected_calibration_error(y, p, 15, w),
        "mean_roc_auc": _mean_defined(aucs),
        "coverage_at_precision": {
            "target": precision_target,
            "coverage": coverage,
            "threshold": _json_float(threshold),
        },
    }
    return figures, aucs


def bootstrap_weights(n: int, n_boot: int, seed: int) -> Iterator[np.ndarray]:
    """``n_boot`` bootstrap resamples of ``n`` rows, each as a count per row (how often the
    row was drawn, with replacement; seeded), so a resampled figure is a weighted sum over
    the rows instead of a copy of them."""
    rng = np.random.default_rng(seed)
    for _ in range(n_boot):
        yield np.bincount(rng.integers(0, n, n), minlength=n).astype(np.float64)


def bootstrap_intervals(y: np.ndarray, p: np.ndarray, n_boot: int = 200,
                        seed: int = 0) -> dict[str, list[float | None]]:
    """95% percentile-bootstrap intervals (Efron and Tibshirani, *An Introduction to the
    Bootstrap*, 1993, ch. 13) of accuracy, macro-F1 and ECE (15 bins): rows resampled with
    replacement ``n_boot`` times, seeded. A resample is a count per row (how often it was
    drawn), so each one costs a few weighted sums over the rows, not a copy of them."""
    n, k = p.shape
    pred = p.argmax(axis=1)
    conf = p[np.arange(n), pred]
    right = (pred == y).astype(np.float64)
    edges = _bin_edges(15)
    bins = _bin_indices(conf, edges)
    cell = y * k + pred
    draws: dict[str, list[float]] = {"accuracy": [], "macro_f1": [], "ece_15": []}
    for w in bootstrap_weights(n, n_boot, seed):
        total = w.sum()
        draws["accuracy"].append(float(w @ right / total))
        cm = np.bincount(cell, weights=w, minlength=k * k).reshape(k, k)
        tp = np.diag(cm)
        support, predicted = cm.sum(axis=1), cm.sum(axis=0)
        present = (support > 0) | (predicted > 0)
        f1 = np.divide(2 * tp, support + predicted, out=np.zeros(k), where=present)
        draws["macro_f1"].append(float(f1[present].mean()) if present.any() else math.nan)
        bw = np.bincount(bins, weights=w, minlength=15)
        gap = np.abs(np.bincount(bins, weights=w * right, minlength=15)
                     - np.bincount(bins, weights=w * conf, minlength=15))
        draws["ece_15"].append(float(gap.sum() / total) if bw.sum() else math.nan)
    return {name: [_json_float(float(np.nanpercentile(v, 2.5))),
                   _json_float(float(np.nanpercentile(v, 97.5)))] for name, v in draws.items()}


def summarize(
    y_true: npt.ArrayLike,
    proba: npt.ArrayLike,
    class_names: list[str],
    sample_weight: npt.ArrayLike | None = None,
    precision_target: float = 0.9,
) -> dict[str, Any]:
    """All headline metrics in one JSON-ready dict (NaN and inf become None).

    Top-level figures count every URL once; with ``sample_weight`` a ``"weighted"``
    sub-dict repeats the headline figures weighted by lookup count.
    """
    y = check_labels(y_true, "y_true")
    p = check_proba(proba, y.shape[0])
    k = p.shape[1]
    names = [str(name) for name in class_names]
    if len(names) != k:
        raise ValueError(f"{len(names)} class names for {k} proba columns")
    if len(set(names)) != k:
        raise ValueError("class_names holds duplicates")
    if y.max() >= k:
        raise ValueError(f"y_true holds class index {y.max()} but there are {k} classes")
    precision_target = float(precision_target)
    if not 0.0 <= precision_target <= 1.0:
        raise ValueError(f"precision_target must lie in [0, 1], got {precision_target}")
    w = None if sample_weight is None else check_weight(sample_weight, y.shape[0])

    figures, aucs = _headline(y, p, None, precision_target)
    pred = p.argmax(axis=1)
    f1s = f1_per_class(y, pred, k)
    support = np.bincount(y, minlength=k)
    confusion = np.zeros((k, k), dtype=np.int64)
    np.add.at(confusion, (y, pred), 1)
    predicted = confusion.sum(axis=0)
    tpr = {fpr: tpr_at_fpr(y, p, fpr) for fpr in (1e-3, 1e-2)}
    per_class = {}
    for c, name in enumerate(names):
        negatives = int(y.shape[0] - support[c])
        row: dict[str, Any] = {
            "support": int(support[c]),
            "precision": _json_float(confusion[c, c] / predicted[c]) if predicted[c] else None,
            "recall": _json_float(confusion[c, c] / support[c]) if support[c] else None,
            "f1": _json_float(f1s[c]),
            "roc_auc": _json_float(aucs[c]),
        }
        for fpr, values in tpr.items():
            # a false-positive rate of f can only be read with at least 1/f negatives
            # (one false positive among fewer already passes it): common practice, no source
            key = f"tpr_at_fpr_{fpr:.0e}".replace("e-0", "e-")
            row[key] = _json_float(values[c]) if negatives >= round(1 / fpr) else None
            if negatives < round(1 / fpr):
                row.setdefault("not_measurable", []).append(
                    f"{key}: needs at least {round(1 / fpr)} negatives, has {negatives}")
        per_class[name] = row
    out: dict[str, Any] = {"n": int(y.shape[0]), "n_classes": k}
    out.update(figures)
    out["intervals_95"] = bootstrap_intervals(y, p, seed=0)
    out["per_class"] = per_class
    out["confusion"] = {"rows_are": "true category", "columns_are": "predicted category",
                        "labels": names, "matrix": confusion.tolist()}
    if w is not None:
        weighted, _ = _headline(y, p, w, precision_target)
        out["weighted"] = {"total_weight": float(w.sum()), **weighted}
    return out
