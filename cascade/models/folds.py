"""Fold assignment that keeps each group (a registered domain, a site) on one side.

Both calibration and stacking need predictions on rows the model did not see; if pages of
one site sat on both sides, those predictions would be too good, and so would the fitted
temperature or fusion weights.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["group_folds"]


def group_folds(groups: Sequence[str], n_folds: int, seed: int, min_rows: int = 50) -> np.ndarray:
    """Fold number per row (0..n_folds-1), whole groups to a fold by a seeded shuffle.

    All rows get -1 (no folds) when ``n_folds < 2``, there are fewer than ``min_rows`` rows,
    or fewer distinct groups than folds.
    """
    n = len(groups)
    if n_folds < 2 or n < min_rows:
        return np.full(n, -1)
    uniq = sorted(set(groups))
    if len(uniq) < n_folds:
        return np.full(n, -1)
    order = np.random.default_rng(seed).permutation(len(uniq))
    fold_of = {uniq[j]: i % n_folds for i, j in enumerate(order)}
    return np.array([fold_of[g] for g in groups])
