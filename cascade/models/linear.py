"""Shared pieces of the linear models: a cache-friendly weight table and sparse storage.

A hashed model's weight matrix is mostly zero rows. Packing the non-zero rows together (row
0 all zeros, every unused column mapped to it) makes scoring a gather from a table small
enough for the CPU cache, and storing only those rows keeps model files small.
"""

from __future__ import annotations

import numpy as np

from cascade.errors import ModelFileError

__all__ = ["compact_table", "pack_rows", "unpack_rows"]


def compact_table(weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(row_of, table)``: ``table[row_of[c]]`` is ``weights[c]`` for every column ``c``."""
    nonzero = np.flatnonzero(np.any(weights != 0, axis=1))
    row_of = np.zeros(weights.shape[0], dtype=np.int32)
    row_of[nonzero] = np.arange(1, len(nonzero) + 1, dtype=np.int32)
    table = np.vstack([np.zeros((1, weights.shape[1]), np.float32), weights[nonzero]])
    return row_of, table


def pack_rows(weights: np.ndarray) -> dict[str, np.ndarray]:
    """The arrays a model file stores for a weight matrix: non-zero rows and their index."""
    nonzero = np.flatnonzero(np.any(weights != 0, axis=1)).astype(np.int64)
    return {"rows": nonzero, "weights": weights[nonzero]}


def unpack_rows(arrays: dict[str, np.ndarray], n_features: int, n_classes: int,
                where: str) -> np.ndarray:
    """Inverse of ``pack_rows``, checking shapes and bounds (``ModelFileError`` if wrong)."""
    rows, weights = arrays["rows"], arrays["weights"]
    if weights.shape != (rows.shape[0], n_classes) or rows.ndim != 1:
        raise ModelFileError(f"{where}: array shapes do not match the class list")
    if rows.size and (rows.min() < 0 or rows.max() >= n_features):
        raise ModelFileError(f"{where}: weight rows fall outside n_features")
    W = np.zeros((n_features, n_classes), dtype=np.float32)
    W[rows] = weights
    return W
