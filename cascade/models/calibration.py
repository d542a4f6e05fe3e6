"""Calibration of a linear model's softmax probabilities, fitted on held-out rows.

Temperature scaling: one scalar, fitted by minimizing the negative log-likelihood of
held-out logits over log-temperature (so it stays positive). It divides every logit by the
same number, so it never changes which class wins: accuracy is untouched, only confidence
moves. ``TopLabelMap`` then bends the winning class's probability by a monotone map, also
without changing the winner.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize_scalar

__all__ = ["MIN_MAP_ROWS", "TopLabelMap", "fit_temperature", "softmax"]


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


#: Fewest held-out rows for a top-label map (below it: the temperature alone).
MIN_MAP_ROWS = 200


class TopLabelMap:
    """A monotone map of the most probable class's probability, fitted by isotonic
    regression of "the top class was right" on that probability over held-out rows
    (top-label calibration; isotonic regression after Zadrozny and Elkan, 2002). The other
    classes share what is left in their old proportions, and the top class is never pushed
    below the second, so the winning class never changes.

    Why beyond the temperature: one temperature can only make every confidence larger or
    smaller. Where a model is too sure at one end and not sure enough at the other (the
    invented demo scenario: 0.98 confident where 92% are right, 0.17 where 4% are), no
    temperature fixes both; a monotone map does. ``xs``/``ys`` are the fitted knots,
    read with linear interpolation and held flat beyond the ends (scikit-learn's
    ``IsotonicRegression.predict`` with ``out_of_bounds="clip"``)."""

    def __init__(self, xs: np.ndarray, ys: np.ndarray) -> None:
        self.xs = np.asarray(xs, dtype=np.float64)
        self.ys = np.asarray(ys, dtype=np.float64)
        if self.xs.ndim != 1 or self.xs.shape != self.ys.shape or self.xs.size < 1:
            raise ValueError("a top-label map needs matching 1-d knot arrays")
        if np.any(np.diff(self.xs) < 0) or np.any(np.diff(self.ys) < 0) or \
                not (np.all((self.ys >= 0) & (self.ys <= 1))
                     and np.all(np.isfinite(self.xs))):
            raise ValueError("top-label map knots must be finite, sorted, and in [0, 1]")

    @classmethod
    def fit(cls, proba: np.ndarray, y: np.ndarray) -> TopLabelMap | None:
        """Fit on held-out probabilities and true class indices; None if too few rows."""
        from sklearn.isotonic import IsotonicRegression

        if len(y) < MIN_MAP_ROWS:
            return None
        conf = proba.max(axis=1)
        right = (proba.argmax(axis=1) == y).astype(np.float64)
        iso = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True,
                                 out_of_bounds="clip").fit(conf, right)
        return cls(iso.X_thresholds_, iso.y_thresholds_)

    def apply(self, proba: np.ndarray) -> np.ndarray:
        """The mapped probabilities of rows ``proba`` (n, k), in place; returned."""
        n = proba.shape[0]
        if n == 0 or proba.shape[1] < 2:
            return proba
        rows = np.arange(n)
        top = proba.argmax(axis=1)
        conf = proba[rows, top]
        second = np.partition(proba, -2, axis=1)[:, -2]
        new = np.interp(conf, self.xs, self.ys)
        # the top stays on top: new / (1 - new) >= second / (1 - conf)
        rest = 1.0 - conf
        ok = rest > 1e-12
        floor = np.where(ok, second / np.maximum(rest + second, 1e-300), conf)
        new = np.where(ok, np.maximum(new, floor * (1 + 1e-9)), conf)
        new = np.minimum(new, 1.0)
        scale = np.where(ok, (1.0 - new) / np.maximum(rest, 1e-300), 1.0)
        proba *= scale[:, None]
        proba[rows, top] = new
        return proba

    def apply_one(self, proba: np.ndarray) -> np.ndarray:
        """``apply`` for one row, in place (the request path: scalars, no per-row arrays)."""
        top = int(proba.argmax())
        conf = float(proba[top])
        rest = 1.0 - conf
        if rest <= 1e-12:
            return proba
        new = float(np.interp(conf, self.xs, self.ys))  # ~1 us for a scalar
        proba[top] = -1.0
        second = float(proba.max())
        new = min(1.0, max(new, second / (rest + second) * (1 + 1e-9)))
        proba *= (1.0 - new) / rest
        proba[top] = new
        return proba
