"""Input checks shared by metrics, the report, the planner and fusion: one set of rules, one
wording of errors. Each check returns the array in the dtype the caller computes with, or
raises ``ValueError`` saying what is wrong (a caller's mistake in the library; in the CLI
these checks run on data cascade built itself, so one failing there is a bug, exit 1)."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["ROW_SUM_TOL", "check_labels", "check_n_classes", "check_proba", "check_weight"]

#: How far a row of ``proba`` may sum from 1 (float32 softmax output over a few dozen
#: classes is off by a few 1e-7; anything past this is a bug upstream, not rounding).
ROW_SUM_TOL = 1e-5


def check_labels(y: npt.ArrayLike, name: str, n_classes: int | None = None) -> np.ndarray:
    """Return ``y`` as a 1-D int64 array of class indices, or raise ValueError."""
    arr = np.asarray(y)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be 1-D, got shape {arr.shape}")
    if arr.shape[0] == 0:
        raise ValueError(f"{name} is empty")
    if arr.dtype == bool or not np.issubdtype(arr.dtype, np.integer):
        raise ValueError(f"{name} must hold integer class indices, got dtype {arr.dtype}")
    arr = arr.astype(np.int64, copy=False)
    if arr.min() < 0:
        raise ValueError(f"{name} holds a negative class index ({arr.min()})")
    if n_classes is not None and arr.max() >= n_classes:
        raise ValueError(
            f"{name} holds class index {arr.max()}, outside 0..{n_classes - 1}"
        )
    return arr


def check_n_classes(n_classes: int) -> int:
    if isinstance(n_classes, bool) or not isinstance(n_classes, int | np.integer):
        raise ValueError(f"n_classes must be an int, got {n_classes!r}")
    if n_classes < 1:
        raise ValueError(f"n_classes must be >= 1, got {n_classes}")
    return int(n_classes)


def check_proba(proba: npt.ArrayLike, n: int | None = None, name: str = "proba",
                n_classes: int | None = None) -> np.ndarray:
    """Return ``proba`` as an (n, k) float64 array of probability rows, or raise ValueError.

    ``n`` and ``n_classes``, when given, are the rows and columns the caller expects."""
    arr = np.asarray(proba, dtype=np.float64)
    if arr.ndim != 2:
        raise ValueError(f"{name} must be 2-D (n, k), got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} rows but {n} were expected")
    if arr.shape[1] < 1:
        raise ValueError(f"{name} has no columns")
    if n_classes is not None and arr.shape[1] != n_classes:
        raise ValueError(f"{name} has {arr.shape[1]} columns; expected probabilities over "
                         f"{n_classes} classes")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} holds NaN or infinite values")
    if arr.size and (arr.min() < -ROW_SUM_TOL or arr.max() > 1 + ROW_SUM_TOL):
        raise ValueError(f"{name} holds values outside [0, 1]")
    sums = arr.sum(axis=1)
    bad = np.flatnonzero(np.abs(sums - 1.0) > ROW_SUM_TOL)
    if bad.size:
        i = int(bad[0])
        raise ValueError(
            f"{name} rows must sum to 1 (within {ROW_SUM_TOL}); {bad.size} do not, "
            f"e.g. row {i} sums to {sums[i]!r}"
        )
    return arr


def check_weight(sample_weight: npt.ArrayLike | None, n: int) -> np.ndarray:
    """Return the weights as float64 (all ones when None), or raise ValueError."""
    if sample_weight is None:
        return np.ones(n, dtype=np.float64)
    w = np.asarray(sample_weight, dtype=np.float64)
    if w.ndim != 1:
        raise ValueError(f"sample_weight must be 1-D, got shape {w.shape}")
    if w.shape[0] != n:
        raise ValueError(f"sample_weight has {w.shape[0]} entries but y_true has {n}")
    if not np.all(np.isfinite(w)):
        raise ValueError("sample_weight holds NaN or infinite values")
    if w.min() < 0:
        raise ValueError(f"sample_weight holds a negative weight ({w.min()})")
    if w.sum() <= 0:
        raise ValueError("sample_weight sums to zero: nothing to evaluate")
    return w
