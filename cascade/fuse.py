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
from pathlib import Path
from typing import Any

import numpy as np
from scipy.optimize import minimize

from cascade import __version__
from cascade.errors import ModelFileError, NotFittedError
from cascade.models.calibration import softmax
from cascade.models.model_files import load_model_dir, save_model_dir

KIND = "fusion"
_FLOOR = 1e-6
GATE_SIGNALS = ("one", "url_top", "url_entropy", "page_top", "page_entropy", "agree",
                "page_words")


@dataclass(frozen=True)
class FusedRow:
    """One fused decision: probabilities, which stage decided, and why."""

    proba: np.ndarray
    stage: str  # "page" (fused) or "url" (fell back)
    reason: str  # "fused", "fetch:<outcome>", "page:thin", "page:none"


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


class Fusion:
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
        pu = np.asarray(url_proba, dtype=np.float64)
        pp = np.asarray(page_proba, dtype=np.float64)
        y = np.asarray(y, dtype=np.int64)
        words = np.asarray(page_words, dtype=np.float64)
        if pu.shape != pp.shape or pu.shape[0] != y.shape[0] or words.shape != y.shape:
            raise ValueError("url_proba, page_proba, y and page_words must have matching rows")
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

    def _check_fitted(self) -> None:
        if not hasattr(self, "theta_"):
            raise NotFittedError("this Fusion is not fitted yet: call fit() or load()")

    def predict_proba(self, url_proba: np.ndarray, page_proba: np.ndarray,
                      page_words: np.ndarray) -> np.ndarray:
        """Fused probabilities; rows whose page is too thin keep the URL probabilities."""
        self._check_fitted()
        pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
        pp = np.atleast_2d(np.asarray(page_proba, dtype=np.float64))
        words = np.atleast_1d(np.asarray(page_words, dtype=np.float64))
        if pu.shape[1] != self.n_classes_ or pp.shape != pu.shape:
            raise ValueError(f"expected probabilities over {self.n_classes_} classes")
        Lu, Lp = np.log(np.clip(pu, _FLOOR, 1)), np.log(np.clip(pp, _FLOOR, 1))
        fused = softmax(self._logits(self.theta_, Lu, Lp, _gates(pu, pp, words)))
        thin = words < self.min_page_words
        fused[thin] = pu[thin]
        return fused

    def combine(self, url_proba: np.ndarray, page_proba: np.ndarray | None,
                page_words: int = 0, fetch_outcome: str = "ok") -> FusedRow:
        """One URL: the fused verdict, or the URL verdict with the reason it was kept."""
        pu = np.asarray(url_proba, dtype=np.float64)
        if fetch_outcome != "ok":
            return FusedRow(pu, "url", f"fetch:{fetch_outcome}")
        if page_proba is None:
            return FusedRow(pu, "url", "page:none")
        if page_words < self.min_page_words:
            return FusedRow(pu, "url", "page:thin")
        fused = self.predict_proba(pu[None, :], np.asarray(page_proba)[None, :],
                                   np.array([page_words]))[0]
        return FusedRow(fused, "page", "fused")

    def describe(self) -> dict[str, Any]:
        """The learned gates, readable: how much each signal moves each model's weight."""
        self._check_fitted()
        a, b, u, v, bias = self._unpack(self.theta_, self.n_classes_)
        return {"url_weight_by_signal": dict(zip(GATE_SIGNALS, np.round(a, 4).tolist(),
                                                 strict=True)),
                "page_weight_by_signal": dict(zip(GATE_SIGNALS, np.round(b, 4).tolist(),
                                                  strict=True))}

    # ------------------------------------------------------------------ files
    def save(self, path: str | Path, links: dict[str, str] | None = None,
             metrics: dict[str, Any] | None = None) -> Path:
        """Write the fusion to a model directory; ``links`` names the model versions it was
        fitted with, so a loader can refuse a fusion paired with other models."""
        self._check_fitted()
        meta = {"cascade_version": __version__,
                "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "params": self.get_params(), "n_classes": self.n_classes_,
                "gate_signals": list(GATE_SIGNALS), "links": links or {},
                "training": self.training_, "metrics": metrics or {}}
        return save_model_dir(path, KIND, meta, {"theta": self.theta_})

    @classmethod
    def load(cls, path: str | Path) -> tuple[Fusion, dict[str, str]]:
        """Read a fusion directory; returns it and the model versions it was fitted with."""
        meta, arrays = load_model_dir(path, KIND)
        try:
            fusion = cls(**meta["params"])
            k = int(meta["n_classes"])
            theta = arrays["theta"].astype(np.float64)
            if list(meta["gate_signals"]) != list(GATE_SIGNALS) or \
                    theta.shape != (2 * len(GATE_SIGNALS) + 3 * k,):
                raise ModelFileError(f"{path}: fusion parameters do not match this version")
            fusion.theta_ = theta
            fusion.n_classes_ = k
            fusion.training_ = meta.get("training", {})
            links = {str(a): str(b) for a, b in meta.get("links", {}).items()}
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, ModelFileError):
                raise
            raise ModelFileError(f"{path}: model.json is missing or has a bad field: {exc}") \
                from None
        return fusion, links

    def get_params(self) -> dict[str, Any]:
        return {"min_page_words": self.min_page_words, "alpha": self.alpha,
                "max_iter": self.max_iter, "class_terms": self.class_terms}

    def __repr__(self) -> str:
        return "Fusion(" + ", ".join(f"{k}={v!r}" for k, v in self.get_params().items()) + ")"
