"""Temperature scaling: one scalar that makes a linear model's softmax probabilities honest.

Fitted by minimizing the negative log-likelihood of held-out logits over log-temperature
(so the temperature stays positive). It divides every logit by the same number, so it never
changes which class wins: accuracy is untouched, only confidence moves.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize_scalar

__all__ = ["fit_temperature", "softmax"]


def softmax(logits: np.ndarray) -> np.ndarray:
    """Row-wise softmax, stable for large logits."""
    z = logits - logits.max(axis=1, keepdims=True)
    np.exp(z, out=z)
    z /= z.sum(axis=1, keepdims=True)
    return z


def _nll(logits: np.ndarray, y: np.ndarray, temperature: float) -> float:
    z = logits / temperature
    z = z - z.max(axis=1, keepdims=True)
    log_norm = np.log(np.exp(z).sum(axis=1))
    return float(np.mean(log_norm - z[np.arange(len(y)), y]))


def fit_temperature(logits: np.ndarray, y: np.ndarray) -> float:
    """The temperature in [0.05, 20] that minimizes held-out negative log-likelihood."""
    logits = np.asarray(logits, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    if len(y) == 0:
        return 1.0
    result = minimize_scalar(
        lambda log_t: _nll(logits, y, float(np.exp(log_t))),
        bounds=(np.log(0.05), np.log(20.0)),
        method="bounded",
        options={"xatol": 1e-4},
    )
    return float(np.exp(result.x))
