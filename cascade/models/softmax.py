"""Multinomial logistic regression (softmax) with L2, fitted by L-BFGS on the used columns.

Hashed feature spaces are mostly empty: of 2**20 columns a training set touches a few
hundred thousand. We fit only those (an unused column gets no gradient from the data and the
L2 term keeps it at zero, so the answer is the same) and scatter the weights back. Written
here rather than taken from scikit-learn's ``LogisticRegression`` because, measured on our
data, that one spent most of each L-BFGS step on the full-width coefficient array (about
10x slower); the objective is the same (``C * sum(w_i * loss_i) + ||W||^2 / 2``, intercept
not penalized).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.optimize import minimize

__all__ = ["fit_softmax"]


_SCIPY_FTOL = 2.220446049250313e-09  # scipy.optimize's L-BFGS-B default (factr 1e7 x eps)


def fit_softmax(
    X: sp.csr_matrix,
    y: np.ndarray,
    n_classes: int,
    C: float = 1.0,
    sample_weight: np.ndarray | None = None,
    max_iter: int = 300,
    tol: float = 1e-6,
    min_count: int = 2,
    init: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Return ``(W, b, info)``: weights (n_features, n_classes) float32, intercepts, and
    the optimizer's report (iterations, converged, final loss). ``init`` warm-starts from
    full-width weights and intercepts."""
    X = sp.csr_matrix(X)
    y = np.asarray(y, dtype=np.int64)
    n, n_features = X.shape
    if C <= 0:
        raise ValueError(f"C must be positive, got {C}")
    weight = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
    if weight.shape != (n,) or (weight < 0).any() or weight.sum() <= 0:
        raise ValueError("sample_weight must be non-negative, one per row, not all zero")
    total = weight.sum()
    weight = weight / total
    alpha = 1.0 / (C * total)
    # A column seen in fewer than ``min_count`` rows is dropped (weight 0): it cannot
    # generalize, and dropping it shrinks the problem several times over.
    doc_freq = np.bincount(X.indices, minlength=n_features)
    used = np.flatnonzero(doc_freq >= max(1, min_count))
    Xc = X[:, used].astype(np.float64).tocsr()
    XcT = Xc.T.tocsr()
    d, k = len(used), n_classes
    Y = np.zeros((n, k))
    Y[np.arange(n), y] = 1.0

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        W = theta[: d * k].reshape(d, k)
        b = theta[d * k :]
        Z = Xc @ W + b
        zmax = Z.max(axis=1, keepdims=True)
        E = np.exp(Z - zmax)
        S = E.sum(axis=1, keepdims=True)
        lse = np.log(S) + zmax
        loss = float(weight @ (lse[:, 0] - Z[np.arange(n), y]))
        G = (E / S - Y) * weight[:, None]
        gW = XcT @ G + alpha * W
        gb = G.sum(axis=0)
        value = loss + 0.5 * alpha * float(np.sum(W * W))
        return value, np.concatenate((gW.ravel(), gb))

    theta0 = np.zeros(d * k + k)
    if init is not None:  # warm start, e.g. a refit on more rows of the same problem
        theta0[: d * k] = np.asarray(init[0], dtype=np.float64)[used].ravel()
        theta0[d * k :] = np.clip(np.asarray(init[1], dtype=np.float64), -30.0, 30.0)
    # ``tol`` bounds the projected gradient and, scaled alike, L-BFGS-B's relative
    # reduction stop (ftol); at the default tol of 1e-6 that is scipy's own default ftol,
    # a tighter tol tightens both (otherwise ftol ends the fit first and tol does nothing)
    ftol = _SCIPY_FTOL * (tol / 1e-6)
    result = minimize(objective, theta0, jac=True, method="L-BFGS-B",
                      options={"maxiter": max_iter, "gtol": tol, "ftol": ftol, "maxcor": 10})
    W = np.zeros((n_features, k), dtype=np.float32)
    W[used] = result.x[: d * k].reshape(d, k)
    b = result.x[d * k :].astype(np.float64)
    info = {"iterations": int(result.nit), "converged": bool(result.success),
            "objective": float(result.fun), "used_columns": int(d)}
    return W, b, info
