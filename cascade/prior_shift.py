"""Calibration under a shifted class mix: re-estimate the class priors of an unlabelled batch
and adjust the posteriors to them.

A calibrated model's probabilities are honest for the class mix it was trained on. When a
night's (or a deployment's) mix differs, they are not: a category that has become common is
under-stated, a rare one over-stated. If only the mix changed (label shift: each class's
URLs look as they did in training), Bayes' rule gives the posterior under new priors
``pi'`` from the old one, ``p'(c|x) ∝ p(c|x) * pi'_c / pi_c``, and the EM procedure of
Saerens, Latinne and Decaestecker (2002, "Adjusting the outputs of a classifier to new a
priori probabilities: a simple procedure", Neural Computation 14(1)) finds the ``pi'`` of
maximum likelihood for the batch: start from the training priors, adjust every row, take
the mean of the adjusted rows as the new priors, repeat until they stop moving.

It assumes only the mix changed; where the classes themselves look different (new sites,
new URL conventions) the estimate can be worse than none. ``docs/night.md`` has the
measured effect.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
from sklearn.base import BaseEstimator

from cascade._validation import check_proba
from cascade.errors import DataError, NotFittedError, UsageError

__all__ = ["PriorShift", "adjust_posteriors", "adjust_to_batch", "training_priors"]


def _check_priors(priors: npt.ArrayLike, n_classes: int, name: str) -> np.ndarray:
    """Non-negative finite weights (counts or priors) over ``n_classes``, normalized."""
    arr = np.asarray(priors, dtype=np.float64)
    if arr.ndim != 1 or arr.shape[0] != n_classes:
        raise DataError(f"{name} must hold one number per class ({n_classes}), "
                        f"got shape {arr.shape}")
    if not np.all(np.isfinite(arr)) or arr.min() < 0 or arr.sum() <= 0:
        raise DataError(f"{name} must be finite, non-negative and not all zero")
    return arr / arr.sum()


def _proba(proba: npt.ArrayLike, n_classes: int | None = None) -> np.ndarray:
    try:
        return check_proba(proba, name="proba", n_classes=n_classes)
    except ValueError as exc:
        raise DataError(f"prior shift: {exc}") from exc


def _ratio(train: np.ndarray, new: np.ndarray) -> np.ndarray:
    """``new / train`` per class; 0 where the class had no training prior."""
    out = np.zeros_like(train)
    support = train > 0
    out[support] = new[support] / train[support]
    return out


def adjust_posteriors(proba: npt.ArrayLike, train_priors: npt.ArrayLike,
                      new_priors: npt.ArrayLike) -> np.ndarray:
    """Bayes' rule for a change of priors: ``p'(c|x) ∝ p(c|x) * new_c / train_c``.

    A class with training prior 0 gets probability 0; a row with no mass on any class
    that had a training prior is returned unchanged."""
    p = _proba(proba)
    k = p.shape[1]
    ratio = _ratio(_check_priors(train_priors, k, "train_priors"),
                   _check_priors(new_priors, k, "new_priors"))
    return _apply(p, ratio)


def _apply(p: np.ndarray, ratio: np.ndarray) -> np.ndarray:
    q = p * ratio
    s = q.sum(axis=1, keepdims=True)
    ok = s[:, 0] > 0
    out = p.copy()
    out[ok] = q[ok] / s[ok]
    return out


class PriorShift(BaseEstimator):
    """Estimate a batch's class priors by EM (Saerens et al. 2002) and adjust posteriors.

    Parameters
    ----------
    max_iter : most EM iterations.
    tol : stop when no prior moves by more than this in one iteration.
    min_prior : floor of an estimated prior (for classes seen in training), so no class is
        ruled out for good by one batch; below ``1 / n_classes``. 0 disables the floor.
    min_rows : a batch with fewer usable rows is left as it is (priors kept, probabilities
        unchanged, ``note_`` says so): EM on a handful of rows fits their noise.

    Learned: ``train_priors_``, ``priors_`` (the estimate), ``n_iter_``, ``converged_``,
    ``log_likelihood_`` (per iteration, the batch's mean log-likelihood under the priors of
    that iteration relative to the training priors; starts at 0 and never decreases, the
    EM property, unless the floor binds), ``applied_``, ``n_rows_``, ``note_``.
    """

    def __init__(self, max_iter: int = 100, tol: float = 1e-6, min_prior: float = 1e-6,
                 min_rows: int = 50) -> None:
        self.max_iter = max_iter
        self.tol = tol
        self.min_prior = min_prior
        self.min_rows = min_rows

    def _check_params(self, n_classes: int) -> None:
        def number(x: Any) -> bool:
            return isinstance(x, int | float | np.integer | np.floating) and \
                not isinstance(x, bool) and bool(np.isfinite(x))

        if not number(self.max_iter) or int(self.max_iter) != self.max_iter or \
                self.max_iter < 1:
            raise UsageError(f"max_iter must be a whole number >= 1, got {self.max_iter!r}")
        if not number(self.tol) or self.tol <= 0:
            raise UsageError(f"tol must be a number > 0, got {self.tol!r}")
        if not number(self.min_prior) or not 0 <= self.min_prior < 1.0 / n_classes:
            raise UsageError(f"min_prior must lie in [0, 1/{n_classes}), "
                             f"got {self.min_prior!r}")
        if not number(self.min_rows) or int(self.min_rows) != self.min_rows or \
                self.min_rows < 1:
            raise UsageError(f"min_rows must be a whole number >= 1, got {self.min_rows!r}")

    def fit(self, proba: npt.ArrayLike, train_priors: npt.ArrayLike) -> PriorShift:
        """Estimate the priors of the batch ``proba`` (n, k), the model's posteriors under
        ``train_priors`` (k counts or priors, in the same column order); returns self."""
        p = _proba(proba)
        k = p.shape[1]
        self._check_params(k)
        train = _check_priors(train_priors, k, "train_priors")
        support = train > 0
        usable = p[:, support].sum(axis=1) > 0  # rows with mass on a class seen in training
        rows = p[usable]
        self.train_priors_ = train
        self.n_rows_ = int(rows.shape[0])
        self.priors_ = train.copy()
        self.n_iter_ = 0
        self.converged_ = False
        self.log_likelihood_ = np.zeros(1)
        if self.n_rows_ < self.min_rows:
            self.applied_ = False
            self.note_ = (f"batch of {self.n_rows_} usable rows is under min_rows="
                          f"{self.min_rows}: training priors kept, probabilities unchanged")
            return self
        priors = train.copy()
        trace = [0.0]  # log-likelihood ratio of the training priors against themselves
        for it in range(1, int(self.max_iter) + 1):
            # E step: posteriors under the current priors; M step: their mean
            new = _apply(rows, _ratio(train, priors)).mean(axis=0)
            new[~support] = 0.0
            if self.min_prior > 0:
                new[support] = np.maximum(new[support], self.min_prior)
            new /= new.sum()
            moved = float(np.abs(new - priors).max())
            priors = new
            trace.append(float(np.mean(np.log(np.maximum(rows @ _ratio(train, priors),
                                                         1e-300)))))
            self.n_iter_ = it
            if moved < self.tol:
                self.converged_ = True
                break
        self.priors_ = priors
        self.log_likelihood_ = np.asarray(trace)
        self.applied_ = True
        self.note_ = (f"EM on {self.n_rows_} rows: " +
                      (f"converged in {self.n_iter_} iterations" if self.converged_ else
                       f"stopped at max_iter={self.max_iter} before converging"))
        return self

    def _check_fitted(self) -> None:
        if not hasattr(self, "priors_"):
            raise NotFittedError("this PriorShift is not fitted yet: call fit() first")

    def transform(self, proba: npt.ArrayLike) -> np.ndarray:
        """``proba`` adjusted to the estimated priors (a copy, unchanged when the batch was
        too small to estimate them)."""
        self._check_fitted()
        p = _proba(proba, n_classes=len(self.priors_))
        if not self.applied_:
            return p.copy()
        return _apply(p, _ratio(self.train_priors_, self.priors_))

    def fit_transform(self, proba: npt.ArrayLike, train_priors: npt.ArrayLike) -> np.ndarray:
        """``fit(proba, train_priors).transform(proba)``."""
        return self.fit(proba, train_priors).transform(proba)

    def describe(self, classes: Sequence[str] | None = None,
                 y_true: npt.ArrayLike | None = None) -> dict[str, Any]:
        """JSON-ready summary for a report: priors by class (training, estimated and, when
        labels ``y_true`` are given, the batch's true mix), iterations, the note."""
        self._check_fitted()
        names = list(classes) if classes is not None else \
            [str(i) for i in range(len(self.priors_))]
        if len(names) != len(self.priors_):
            raise DataError(f"{len(names)} class names for {len(self.priors_)} priors")

        def by_class(values: np.ndarray) -> dict[str, float]:
            return {c: round(float(v), 4) for c, v in zip(names, values, strict=True)}

        out: dict[str, Any] = {
            "applied": bool(self.applied_), "rows": self.n_rows_, "note": self.note_,
            "iterations": self.n_iter_, "converged": bool(self.converged_),
            "log_likelihood_gain": round(float(self.log_likelihood_[-1]), 6),
            "training_priors": by_class(self.train_priors_),
            "estimated_priors": by_class(self.priors_),
        }
        if y_true is not None:
            y = np.asarray(y_true, dtype=np.int64)
            out["true_mix"] = by_class(np.bincount(y, minlength=len(names)) / max(len(y), 1))
        return out


def training_priors(model: Any) -> np.ndarray:
    """The class priors a fitted or loaded URL model (or a ``ModelBundle``, for its URL
    model) was trained under, in ``classes_`` order, from ``training_["class_counts"]``.

    With ``class_balance`` b the rows were weighted by ``(1 / frequency) ** b``, so the
    priors the model learned are proportional to ``count ** (1 - b)``. Row weights passed
    to ``fit`` are not recorded and not accounted for."""
    model = getattr(model, "url_model", model)
    training = getattr(model, "training_", None)
    classes = getattr(model, "classes_", None)
    counts = training.get("class_counts") if isinstance(training, Mapping) else None
    if classes is None or not isinstance(counts, Mapping):
        raise DataError("the model records no training class counts (training_"
                        "['class_counts']): fit it, or retrain a model saved without them")
    missing = [c for c in classes if c not in counts]
    if missing:
        raise DataError(f"the model's class counts lack {missing[:3]}: the model file is "
                        f"inconsistent; retrain it")
    arr = np.array([float(counts[c]) for c in classes])
    balance = float(getattr(model, "class_balance", 0.0) or 0.0)
    if balance:
        arr = np.where(arr > 0, arr ** (1.0 - balance), 0.0)
    return _check_priors(arr, len(classes), "training class counts")


def adjust_to_batch(proba: npt.ArrayLike, model: Any, *, min_rows: int = 50,
                    y_true: npt.ArrayLike | None = None) -> tuple[np.ndarray, dict[str, Any]]:
    """Fit ``PriorShift`` on a batch of ``model``'s probabilities (training priors from the
    model) and return the adjusted batch with ``describe``'s summary; what the nightly job
    and ``cascade report --prior-shift`` use."""
    url_model = getattr(model, "url_model", model)
    shift = PriorShift(min_rows=min_rows).fit(proba, training_priors(url_model))
    return shift.transform(proba), shift.describe(list(url_model.classes_), y_true)
