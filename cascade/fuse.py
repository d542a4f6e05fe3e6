"""Fusion of the URL model's and the page model's probabilities into one calibrated verdict.

Method: a gated log-linear pool (a stacked model with few parameters), learned on held-out
(out-of-fold) probabilities of both models:

    z_c = a(g) * log p_url_c + b(g) * log p_page_c + u_c * log p_url_c + v_c * log p_page_c + bias_c

where ``a(g)`` and ``b(g)`` are linear in a row's reliability signals ``g`` (each model's top
probability and normalized entropy, whether they agree, how many words the page has). So it
learns *when* to trust the page (a long page, a confident page model, an unsure URL model)
and *for which categories* (``u``, ``v``), rather than averaging the two everywhere; a fixed
average is what breaks many of the URL model's right answers. It is fitted by minimizing the
negative log-likelihood with an L2 pull towards the plain product (``a = b = 1``), so the
fused probabilities stay calibrated (the expected calibration error is reported by the
evaluation). A fetch that failed, or a page with too few words, keeps the URL verdict with
the reason recorded.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from scipy.optimize import minimize
from sklearn.base import BaseEstimator

from cascade._validation import check_labels, check_proba
from cascade.errors import ModelFileError, NotFittedError
from cascade.models.calibration import softmax
from cascade.models.model_files import ModelFileMixin
from cascade.models.params import Constraint, Interval, OneOf, check_params
from cascade.verdict import Reason, Stage, fetch_reason

__all__ = ["GATE_SIGNALS", "FusedRow", "Fusion"]

_FLOOR = 1e-6
GATE_SIGNALS = ("one", "url_top", "url_entropy", "page_top", "page_entropy", "agree",
                "page_words")


@dataclass(frozen=True)
class FusedRow:
    """One fused decision: probabilities, which stage decided, and why."""

    proba: np.ndarray
    stage: Stage  # PAGE (fused) or URL (fell back)
    reason: str  # Reason.FUSED, fetch_reason(outcome), Reason.PAGE_THIN, Reason.PAGE_NONE


def _gates(pu: np.ndarray, pp: np.ndarray, words: np.ndarray) -> np.ndarray:
    k = pu.shape[1]
    norm = np.log(k) if k > 1 else 1.0

    def entropy(p: np.ndarray) -> np.ndarray:
        q = np.clip(p, 1e-12, 1.0)
        return -(q * np.log(q)).sum(axis=1) / norm

    return np.column_stack([
        np.ones(pu.shape[0]), pu.max(axis=1), entropy(pu), pp.max(axis=1), entropy(pp),
        (pu.argmax(axis=1) == pp.argmax(axis=1)).astype(np.float64),
        np.clip(np.log1p(words) / np.log(1000.0), 0.0, 1.5),
    ])


class Fusion(ModelFileMixin, BaseEstimator):
    """Stacked, gated log-linear pool of two calibrated probability vectors.

    Parameters
    ----------
    min_page_words : pages with fewer words, over all fields the page model reads, keep
        the URL verdict (reason ``page:thin``).
    alpha : strength of the L2 pull towards the plain product of the two models.
    max_iter : L-BFGS iterations.
    class_terms : learn the per-class terms ``u``, ``v``, ``bias``; off, only the gates are
        learned, which is more robust when the deployed label mix differs from training.
    """

    _model_kind = "fusion"
    _version_prefix = "fusion"
    _param_rules: ClassVar[dict[str, Constraint]] = {
        "min_page_words": Interval(0, None, integer=True),
        "alpha": Interval(0, None),
        "max_iter": Interval(1, None, integer=True),
        "class_terms": OneOf((True, False)),
    }

    def __init__(self, min_page_words: int = 5, alpha: float = 0.1, max_iter: int = 500,
                 class_terms: bool = True) -> None:
        self.min_page_words = min_page_words
        self.alpha = alpha
        self.max_iter = max_iter
        self.class_terms = class_terms

    def _unpack(self, theta: np.ndarray, k: int) -> tuple[np.ndarray, ...]:
        g = len(GATE_SIGNALS)
        a, b = theta[:g], theta[g: 2 * g]
        u, v, bias = theta[2 * g: 2 * g + k], theta[2 * g + k: 2 * g + 2 * k], theta[2 * g + 2 * k:]
        return a, b, u, v, bias

    def _logits(self, theta: np.ndarray, Lu: np.ndarray, Lp: np.ndarray, G: np.ndarray
                ) -> np.ndarray:
        a, b, u, v, bias = self._unpack(theta, Lu.shape[1])
        return (G @ a)[:, None] * Lu + (G @ b)[:, None] * Lp + u * Lu + v * Lp + bias

    def fit(self, url_proba: np.ndarray, page_proba: np.ndarray, y: np.ndarray,
            page_words: np.ndarray) -> Fusion:
        """Learn the pool from held-out probabilities (rows with a usable page); returns self.

        ``y`` holds class indices in the two models' shared column order.
        """
        self._check_params()
        y = np.asarray(y, dtype=np.int64) if len(y) == 0 else check_labels(y, "y")
        pu = check_proba(url_proba, len(y), "url_proba")
        pp = check_proba(page_proba, len(y), "page_proba", n_classes=pu.shape[1])
        words = np.asarray(page_words, dtype=np.float64)
        if words.shape != y.shape:
            raise ValueError("page_words must hold one number per row")
        keep = words >= self.min_page_words
        pu, pp, y, words = pu[keep], pp[keep], y[keep], words[keep]
        n, k = pu.shape
        g = len(GATE_SIGNALS)
        theta0 = np.zeros(2 * g + 3 * k)
        theta0[0] = 1.0  # a: start from the plain product of the two models
        theta0[g] = 1.0
        self.n_classes_ = k
        if n < 20 or len(np.unique(y)) < 2:
            self.theta_ = theta0
            self.training_ = {"n_rows": int(n), "note": "too few rows: plain product"}
            return self
        Lu, Lp = np.log(np.clip(pu, _FLOOR, 1)), np.log(np.clip(pp, _FLOOR, 1))
        G = _gates(pu, pp, words)
        Y = np.zeros((n, k))
        Y[np.arange(n), y] = 1.0
        alpha = self.alpha

        def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
            Z = self._logits(theta, Lu, Lp, G)
            Z -= Z.max(axis=1, keepdims=True)
            E = np.exp(Z)
            S = E.sum(axis=1, keepdims=True)
            loss = float(np.mean(np.log(S[:, 0]) - Z[np.arange(n), y]))
            D = (E / S - Y) / n
            DLu, DLp = (D * Lu), (D * Lp)
            grad = np.concatenate([G.T @ DLu.sum(axis=1), G.T @ DLp.sum(axis=1),
                                   DLu.sum(axis=0), DLp.sum(axis=0), D.sum(axis=0)])
            diff = theta - theta0
            grad = grad + alpha * diff
            if not self.class_terms:
                grad[2 * g:] = 0.0
            return loss + 0.5 * alpha * float(diff @ diff), grad

        started = time.perf_counter()
        result = minimize(objective, theta0, jac=True, method="L-BFGS-B",
                          options={"maxiter": self.max_iter})
        self.theta_ = result.x
        self.training_ = {"n_rows": int(n), "iterations": int(result.nit),
                          "converged": bool(result.success), "nll": float(result.fun),
                          "seconds": round(time.perf_counter() - started, 3)}
        return self

    def _check_params(self) -> None:
        check_params(self, self._param_rules)

    def _check_fitted(self) -> None:
        if not hasattr(self, "theta_"):
            raise NotFittedError("this Fusion is not fitted yet: call fit() or load()")

    def predict_proba(self, url_proba: np.ndarray, page_proba: np.ndarray,
                      page_words: np.ndarray) -> np.ndarray:
        """Fused probabilities; rows whose page is too thin keep the URL probabilities."""
        self._check_fitted()
        pu = check_proba(np.atleast_2d(url_proba), None, "url_proba", n_classes=self.n_classes_)
        pp = check_proba(np.atleast_2d(page_proba), len(pu), "page_proba",
                         n_classes=self.n_classes_)
        words = np.atleast_1d(np.asarray(page_words, dtype=np.float64))
        if words.shape != (len(pu),):
            raise ValueError("page_words must hold one number per row")
        Lu, Lp = np.log(np.clip(pu, _FLOOR, 1)), np.log(np.clip(pp, _FLOOR, 1))
        fused = softmax(self._logits(self.theta_, Lu, Lp, _gates(pu, pp, words)))
        thin = words < self.min_page_words
        fused[thin] = pu[thin]
        return fused

    def combine(self, url_proba: np.ndarray, page_proba: np.ndarray | None,
                page_words: int = 0, fetch_outcome: str = "ok") -> FusedRow:
        """One URL: the fused verdict, or the URL verdict with the reason it was kept."""
        pu = np.asarray(url_proba, dtype=np.float64)
        if str(fetch_outcome) != "ok":
            return FusedRow(pu, Stage.URL, fetch_reason(fetch_outcome))
        if page_proba is None:
            return FusedRow(pu, Stage.URL, Reason.PAGE_NONE)
        if page_words < self.min_page_words:
            return FusedRow(pu, Stage.URL, Reason.PAGE_THIN)
        fused = self.predict_proba(pu[None, :], np.asarray(page_proba)[None, :],
                                   np.array([page_words]))[0]
        return FusedRow(fused, Stage.PAGE, Reason.FUSED)

    def describe(self) -> dict[str, Any]:
        """The learned gates, readable: how much each signal moves each model's weight."""
        self._check_fitted()
        a, b, u, v, bias = self._unpack(self.theta_, self.n_classes_)
        return {"url_weight_by_signal": dict(zip(GATE_SIGNALS, np.round(a, 4).tolist(),
                                                 strict=True)),
                "page_weight_by_signal": dict(zip(GATE_SIGNALS, np.round(b, 4).tolist(),
                                                  strict=True))}

    # ------------------------------------------------------------------ files
    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"n_classes": self.n_classes_, "gate_signals": list(GATE_SIGNALS),
                 "training": self.training_}, {"theta": self.theta_})

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        k = int(meta["n_classes"])
        theta = arrays["theta"].astype(np.float64)
        if list(meta["gate_signals"]) != list(GATE_SIGNALS) or \
                theta.shape != (2 * len(GATE_SIGNALS) + 3 * k,):
            raise ModelFileError(f"{where}: fusion parameters do not match this version")
        self.theta_ = theta
        self.n_classes_ = k
