"""Multinomial logistic regression (softmax) with L2, fitted to convergence by L-BFGS on the
used columns.

Hashed feature spaces are mostly empty: of 2**20 columns a training set touches a few
hundred thousand. We fit only those (an unused column gets no gradient from the data and the
L2 term keeps it at zero, so the answer is the same) and scatter the weights back. The
objective is scikit-learn's ``LogisticRegression`` one, per row-weight unit:
``sum(w_i * loss_i) / sum(w) + ||W||^2 / (2 * C * sum(w))``, intercept not penalized.

Written here rather than calling scipy's L-BFGS-B or scikit-learn: measured on the
open-directory hosts (800k parameters), scipy's bound-constrained Fortran step took half of
every iteration (30 ms), and both keep the whole problem in one thread. Here:

- L-BFGS by the two-loop recursion (Nocedal and Wright, *Numerical Optimization*, 2nd ed.,
  algorithms 7.4 and 7.5) with a backtracking Armijo line search; the objective is strictly
  convex (L2), so every accepted step keeps the curvature pair positive;
- the sparse products run in float32 on a fixed number of row blocks, in threads (scipy's
  sparse kernels release the GIL); the blocks are summed in a fixed order, so the result does
  not depend on the number of threads;
- the solver's vectors are float32 beyond small problems (they only shape the steps; the
  objective is summed in float64); the curvature pairs take at most 512 MiB (fewer pairs
  for very large problems); beyond them and the data, memory is about ten vectors of
  ``columns * classes``.

It stops when the largest gradient component is below ``tol`` (scikit-learn's
``LogisticRegression`` criterion and default), or when a step no longer lowers the
objective by a relative ``ftol``; ``max_iter`` is only a safety bound and the report says
whether it was reached.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

__all__ = ["FitProgress", "compact_columns", "fit_softmax", "resolve_jobs"]

_BLOCKS = 4  # fixed row blocks: results independent of the thread count
_PAIR_BYTES = 512 << 20  # memory for the curvature pairs
_CHUNK_ROWS = 65_536  # rows per temporary in column_squares
_CHUNK_ENTRIES = 1 << 24  # stored entries per temporary in compact_columns
_ARMIJO = 1e-4  # sufficient-decrease constant (Nocedal and Wright, section 3.1)


@dataclass(frozen=True)
class FitProgress:
    """One L-BFGS iteration, for progress reports: ``gradient`` is the largest gradient
    component, ``tol`` the target, ``eta_s`` a guess from the gradient's recent decrease
    (None until there is a trend)."""

    iteration: int
    max_iter: int
    objective: float
    gradient: float
    tol: float
    seconds: float
    eta_s: float | None


def resolve_jobs(n_jobs: int | None) -> int:
    """Threads for ``n_jobs`` (scikit-learn's meaning: None is 1, -1 all cores, -2 all but
    one), capped at the number of row blocks."""
    cores = os.cpu_count() or 1
    if n_jobs is None:
        jobs = 1
    elif n_jobs < 0:
        jobs = max(1, cores + 1 + n_jobs)
    else:
        jobs = max(1, n_jobs)
    return min(jobs, _BLOCKS)


def _runs(rows: np.ndarray) -> list[tuple[int, int]]:
    """Sorted row indices as maximal runs ``[a, b)`` of consecutive rows."""
    if rows.size == 0:
        return []
    breaks = np.flatnonzero(np.diff(rows) != 1)
    starts = np.concatenate(([rows[0]], rows[breaks + 1]))
    stops = np.concatenate((rows[breaks] + 1, [rows[-1] + 1]))
    return [(int(a), int(b)) for a, b in zip(starts, stops, strict=True)]


def _csr_view(data: np.ndarray, indices: np.ndarray, indptr: np.ndarray,
              shape: tuple[int, int]) -> sp.csr_matrix:
    """A CSR matrix over the given arrays, never copied. ``sp.csr_matrix((data, indices,
    indptr))`` copies arrays that are slices of a much larger one (scipy "prunes" them),
    which for row blocks of a million URLs copied the whole data set, 1.2 GB; the arrays
    are set as the matrix's documented attributes instead."""
    view = sp.csr_matrix(shape, dtype=data.dtype)
    view.data, view.indices, view.indptr = data, indices, indptr.astype(indices.dtype,
                                                                        copy=False)
    view.has_sorted_indices = False  # not checked: the products do not need it
    return view


def _column_counts(indices: np.ndarray, width: int) -> np.ndarray:
    """Stored entries per column, in chunks (``np.bincount`` first copies its input to
    64-bit integers: at a million URLs, a gigabyte at once)."""
    count = np.zeros(width, dtype=np.int64)
    for a in range(0, indices.size, _CHUNK_ENTRIES):
        count += np.bincount(indices[a:a + _CHUNK_ENTRIES], minlength=width)
    return count


def compact_columns(X: sp.csr_matrix, min_count: int) -> tuple[sp.csr_matrix, np.ndarray]:
    """Renumber ``X``'s columns in place: the columns with at least ``min_count`` stored
    entries become ``0 .. d-1``, most frequent first; every other entry moves to one extra
    column ``d`` and its value becomes 0. Returns ``(X', used)``: ``X'`` of width ``d + 1``
    shares ``X``'s arrays (``X`` itself must not be used afterwards), and ``used[j]`` is
    the original column of compact column ``j``; fit it with ``fit_softmax(...,
    min_count=0)`` and scatter the weights back with ``W_full[used] = W[:d]``.

    Why: the fit then reads the rows without a renumbered copy of their column indices
    (at a million URLs that copy is most of a gigabyte), and the frequent columns sit
    together in the weight and gradient tables, so the sparse products' gathers and
    scatters stay in cache. Occurrences are counted over all rows, so a calibration fold
    keeps a column seen twice overall even if its training side holds it once (the L2
    term keeps such weights small)."""
    if not sp.isspmatrix_csr(X):
        raise TypeError("compact_columns needs a CSR matrix")
    count = _column_counts(X.indices, X.shape[1])
    used = np.flatnonzero(count >= max(1, min_count))
    used = used[np.argsort(-count[used], kind="stable")]
    d = len(used)
    remap = np.full(X.shape[1], d, dtype=X.indices.dtype)  # dropped: the extra column d
    remap[used] = np.arange(d, dtype=X.indices.dtype)
    del count
    for a in range(0, X.indices.size, _CHUNK_ENTRIES):
        mapped = remap[X.indices[a:a + _CHUNK_ENTRIES]]
        X.data[a:a + _CHUNK_ENTRIES][mapped == d] = 0
        X.indices[a:a + _CHUNK_ENTRIES] = mapped
    out = sp.csr_matrix((X.data, X.indices, X.indptr), shape=(X.shape[0], d + 1),
                        copy=False)
    # sorted, merged, without the dropped entries: fewer entries, and the products then
    # walk each row's columns in order (measured 25% faster products at 250,000 URLs)
    out.sum_duplicates()
    out.eliminate_zeros()
    return out, used


class _Products:
    """``X @ W`` and ``X.T @ G`` over the training rows, on fixed row blocks, in float32,
    optionally threaded.

    The training rows are given as runs of consecutive rows of ``X`` (a calibration fold's
    training side is all rows but one contiguous fold, see ``CalibratedLinearClassifier``),
    so each block is a view of ``X``'s data: no copy of the rows is made. Column indices are
    renumbered to the used columns (``remap``; a dropped column goes to the extra last
    column, whose weight stays zero), which is the one copy: 4 bytes per stored entry, none
    when ``remap`` is None (``X`` already compact, see ``compact_columns``).
    Blocks are fixed by the training rows alone and summed in a fixed order, so the result
    does not depend on the number of threads."""

    def __init__(self, X: sp.csr_matrix, runs: list[tuple[int, int]], remap: np.ndarray | None,
                 width: int, n_jobs: int) -> None:
        m = sum(b - a for a, b in runs)
        cuts = np.linspace(0, m, min(_BLOCKS, max(1, m)) + 1).astype(np.int64)
        data = X.data if X.data.dtype == np.float32 else None
        self.blocks: list[list[tuple[int, int, sp.csr_matrix]]] = []
        self.m, self.width = m, width
        pos = 0  # training position of the current run's first row
        pieces: list[tuple[int, int, int, int]] = []  # (position, rows a, b) split at cuts
        for a, b in runs:
            while a < b:
                block = int(np.searchsorted(cuts, pos, side="right")) - 1
                take = min(b - a, int(cuts[block + 1]) - pos)
                pieces.append((block, pos, a, a + take))
                pos, a = pos + take, a + take
        for block in range(len(cuts) - 1):
            mine = []
            for blk, at, a, b in pieces:
                if blk != block or b <= a:
                    continue
                lo, hi = int(X.indptr[a]), int(X.indptr[b])
                values = data[lo:hi] if data is not None else \
                    X.data[lo:hi].astype(np.float32)
                cols = X.indices[lo:hi] if remap is None else remap[X.indices[lo:hi]]
                view = _csr_view(values, cols, X.indptr[a:b + 1] - X.indptr[a],
                                 (b - a, width))
                mine.append((at, at + (b - a), view))
            if mine:
                self.blocks.append(mine)
        self.jobs = max(1, min(n_jobs, len(self.blocks)))
        self.pool = ThreadPoolExecutor(n_jobs) if self.jobs > 1 else None

    def _map(self, fn, items):
        if self.pool is None:
            return [fn(i) for i in items]
        return list(self.pool.map(fn, items))

    def forward(self, W32: np.ndarray, out: np.ndarray) -> np.ndarray:
        def one(i: int) -> None:
            for a, b, view in self.blocks[i]:
                out[a:b] = view @ W32
        self._map(one, range(len(self.blocks)))
        return out

    def backward(self, G32: np.ndarray, out: np.ndarray) -> np.ndarray:
        """``X.T @ G`` for the used columns (the extra last one left out), summed in a fixed
        order into ``out`` (d, k), in ``out``'s precision. Blocks run as many at a time as
        there are threads, so only that many full-width partial sums exist at once (the
        order of the sum, block 0, 1, 2, ..., does not depend on it)."""
        def one(i: int) -> np.ndarray:
            total = None
            for a, b, view in self.blocks[i]:
                part = view.T @ G32[a:b]
                if total is None:
                    total = part
                else:
                    total += part
            return total
        rows = out.shape[0]
        for first in range(0, len(self.blocks), self.jobs):
            parts = self._map(one, range(first, min(len(self.blocks), first + self.jobs)))
            for j, part in enumerate(parts):
                if first == 0 and j == 0:
                    out[:] = part[:rows]
                else:
                    out += part[:rows]
            del parts, part
        return out

    def column_squares(self, weight: np.ndarray) -> np.ndarray:
        """``sum_i weight_i * x_ij ** 2`` per column, in row chunks (bounded temporaries)."""
        total = np.zeros(self.width)
        for block in self.blocks:
            for a, _, view in block:
                for r in range(0, view.shape[0], _CHUNK_ROWS):
                    part = view[r:r + _CHUNK_ROWS]
                    per_entry = np.repeat(weight[a + r:a + r + part.shape[0]],
                                          np.diff(part.indptr))
                    total += np.bincount(part.indices, weights=per_entry * part.data
                                         * part.data, minlength=self.width)
        return total

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown()


def fit_softmax(
    X: sp.csr_matrix,
    y: np.ndarray,
    n_classes: int,
    C: float = 1.0,
    sample_weight: np.ndarray | None = None,
    max_iter: int = 1000,
    tol: float = 1e-4,
    min_count: int = 2,
    init: tuple[np.ndarray, np.ndarray] | None = None,
    n_jobs: int | None = None,
    memory: int = 8,
    ftol: float = 1e-10,
    progress: Callable[[FitProgress], None] | None = None,
    rows: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Return ``(W, b, info)``: weights (n_features, n_classes) float32, intercepts, and
    the optimizer's report (iterations, converged, why it stopped, final objective and
    gradient). ``init`` warm-starts from weights over X's columns and intercepts (e.g. a refit
    of the same problem on more rows); ``progress`` is called after every iteration.
    ``rows`` (sorted indices; None: all) fits on those rows of ``X``, ``y`` and
    ``sample_weight`` without copying them (cheapest when they form few runs).
    ``min_count=0`` keeps every column of an ``X`` made by ``compact_columns``."""
    started = time.perf_counter()
    if not sp.isspmatrix_csr(X):
        X = sp.csr_matrix(X)
    y = np.asarray(y, dtype=np.int64)
    n_all, n_features = X.shape
    if y.shape != (n_all,):
        raise ValueError(f"y must hold one class per row of X ({n_all})")
    if C <= 0:
        raise ValueError(f"C must be positive, got {C}")
    if tol <= 0 or max_iter < 1 or memory < 1 or min_count < 0:
        raise ValueError("tol must be positive, max_iter and memory at least 1, min_count "
                         "at least 0")
    rows = np.arange(n_all) if rows is None else np.asarray(rows, dtype=np.int64)
    if rows.size and ((np.diff(rows) <= 0).any() or rows[0] < 0 or rows[-1] >= n_all):
        raise ValueError("rows must be sorted, distinct row indices of X")
    runs = _runs(rows)
    y = y[rows]
    n = len(rows)
    weight = np.ones(n) if sample_weight is None else \
        np.asarray(sample_weight, dtype=np.float64)[rows]
    if sample_weight is not None and np.shape(sample_weight) != (n_all,):
        raise ValueError("sample_weight must hold one number per row of X")
    if (weight < 0).any() or weight.sum() <= 0:
        raise ValueError("sample_weight must be non-negative, one per row, not all zero")
    total = weight.sum()
    weight = weight / total
    alpha = 1.0 / (C * total)
    # A column seen in fewer than ``min_count`` rows is dropped (weight 0): it cannot
    # generalize, and dropping it shrinks the problem several times over. 0: X is
    # already compact (``compact_columns``), every column is kept and read in place.
    k = n_classes
    if min_count == 0:
        used, remap = np.arange(n_features), None
    else:
        doc_freq = np.zeros(n_features, dtype=np.int64)
        for a, b in runs:
            doc_freq += _column_counts(X.indices[X.indptr[a]:X.indptr[b]], n_features)
        used = np.flatnonzero(doc_freq >= min_count)
        del doc_freq
        remap = np.full(n_features, len(used), dtype=X.indices.dtype)  # dropped: column d
        remap[used] = np.arange(len(used), dtype=X.indices.dtype)
    d = len(used)
    # The solver's vectors (point, gradient, curvature pairs) are float32 once float64
    # pairs would pass 64 MiB: they only shape the steps, the objective is summed in
    # float64. On the open-directory hosts float32 pairs gave the same iterations and
    # objective to six digits as float64, 20% faster, and float32 halves the solver's
    # memory at a million URLs; small problems keep float64, so a very tight tol can still
    # be reached. Past 512 MiB there are fewer pairs (at least 3).
    p = d * k + k
    dtype = np.float64 if 2 * memory * p * 8 <= _PAIR_BYTES // 8 else np.float32
    if dtype is np.float32:
        memory = max(3, min(memory, _PAIR_BYTES // (2 * p * 4)))

    # an extra last column takes the dropped entries (its weight stays zero); a compact X
    # has none, and its float32 weights are read straight from the solver's point
    extra = 0 if remap is None else 1
    products = _Products(X, runs, remap, d + extra, resolve_jobs(n_jobs))
    del remap
    every = np.arange(min(n, _CHUNK_ROWS))
    Z = np.empty((n, k), dtype=np.float32)
    W32 = None if extra == 0 and dtype is np.float32 else \
        np.zeros((d + extra, k), dtype=np.float32)

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        W = theta[: d * k].reshape(d, k)
        b = theta[d * k:].astype(np.float64)
        if W32 is not None:
            W32[:d] = W
        products.forward(W if W32 is None else W32, Z)
        loss, gb = 0.0, np.zeros(k)
        for a in range(0, n, _CHUNK_ROWS):  # softmax in row chunks: bounded temporaries
            z = slice(a, min(n, a + _CHUNK_ROWS))
            Zb = Z[z].astype(np.float64)
            Zb += b
            Zb -= Zb.max(axis=1, keepdims=True)
            at, wz = every[: Zb.shape[0]], weight[z]
            true = Zb[at, y[z]].copy()
            np.exp(Zb, out=Zb)
            S = Zb.sum(axis=1)
            loss += float(wz @ (np.log(S) - true))
            Zb /= S[:, None]
            Zb[at, y[z]] -= 1.0
            Zb *= wz[:, None]
            gb += Zb.sum(axis=0)
            Z[z] = Zb  # the logits' gradient replaces them: one n x k array, not two
        grad = np.empty_like(theta)
        gW = grad[: d * k].reshape(d, k)
        products.backward(Z, gW)
        for a in range(0, d, _CHUNK_ROWS):  # gW += alpha * W without a full temporary
            gW[a:a + _CHUNK_ROWS] += dtype(alpha) * W[a:a + _CHUNK_ROWS]
        grad[d * k:] = gb
        value = loss + 0.5 * alpha * _squared_norm(theta[: d * k])
        return value, grad

    # diagonal of the Hessian at the uniform start, per column (same for every class):
    # sum_i w_i x_ij^2 (1/k)(1 - 1/k) + alpha; the intercepts get the data term alone
    spread = (1.0 / k) * (1.0 - 1.0 / k)
    col_sq = products.column_squares(weight)[:d]
    inv_diag = np.empty(d * k + k, dtype=dtype)
    inv_diag[: d * k].reshape(d, k)[:] = (1.0 / (col_sq * spread + alpha))[:, None]
    inv_diag[d * k:] = 1.0 / spread
    del col_sq
    theta = np.zeros(d * k + k, dtype=dtype)
    if init is not None:
        init_w = np.asarray(init[0])  # compact X: already in its columns, no copy
        theta[: d * k] = (init_w if extra == 0 and init_w.shape[0] == d else
                          init_w[used]).ravel()
        theta[d * k:] = np.clip(np.asarray(init[1], dtype=np.float64), -30.0, 30.0)
    # BLAS threads off: the vector steps are memory-bound, and OpenBLAS's own threads,
    # spinning beside ours on a busy machine, made one dot product 10x slower (measured)
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            theta, info = _lbfgs(objective, theta, max_iter, tol, ftol, memory, progress,
                                 started, inv_diag=inv_diag)
    finally:
        products.close()
    W = np.zeros((n_features, k), dtype=np.float32)
    W[used] = theta[: d * k].reshape(d, k)
    b = theta[d * k:].astype(np.float64)
    info.update(used_columns=int(d), seconds=round(time.perf_counter() - started, 3))
    return W, b, info


def _lbfgs(fg: Callable[[np.ndarray], tuple[float, np.ndarray]], x: np.ndarray,
           max_iter: int, tol: float, ftol: float, memory: int,
           progress: Callable[[FitProgress], None] | None, started: float,
           inv_diag: np.ndarray | None = None) -> tuple[np.ndarray, dict]:
    """Minimize a smooth strictly convex ``fg`` (value, gradient) from ``x``, in ``x``'s
    precision.

    ``inv_diag`` is the inverse of a positive estimate of the Hessian's diagonal; the
    initial inverse-Hessian of every two-loop pass is ``gamma * diag(inv_diag)`` (the
    diagonally scaled L-BFGS of Nocedal and Wright, section 7.2) instead of ``gamma * I``:
    hashed n-gram columns differ in frequency by orders of magnitude, and without it the
    rare ones take hundreds of iterations to settle."""
    f, g = fg(x)
    nfev = 1
    pairs: list[tuple[np.ndarray, np.ndarray, float]] = []  # (s, y, 1 / y.s)
    gmax = _abs_max(g)
    history: list[tuple[int, float]] = [(0, gmax)]
    it, stop = 0, "gradient below tol"
    while gmax > tol:
        if it >= max_iter:
            stop = "max_iter reached before the gradient fell below tol"
            break
        it += 1
        direction = _two_loop(g, pairs, inv_diag)
        slope = float(np.dot(g, direction))
        if not slope < 0:  # not a descent direction (round-off): restart from the gradient
            pairs.clear()
            direction = _two_loop(g, pairs, inv_diag)
            slope = float(np.dot(g, direction))
        step = 1.0 if pairs else min(1.0, 1.0 / max(float(np.linalg.norm(direction)), 1e-12))
        x_new = g_new = None
        for _ in range(40):
            del x_new, g_new  # a failed trial's vectors go before the next one's come
            x_new = direction * step
            x_new += x
            f_new, g_new = fg(x_new)
            nfev += 1
            if f_new <= f + _ARMIJO * step * slope:
                break
            step *= 0.5
        else:
            stop = "line search found no lower point (converged to round-off)"
            break
        del direction
        # the oldest pair's arrays are reused for the newest once memory is full
        s, yv, _ = pairs.pop(0) if len(pairs) >= memory else (None, None, 0.0)
        s = np.subtract(x_new, x, out=s)
        yv = np.subtract(g_new, g, out=yv)
        sy = float(np.dot(s, yv))
        if sy > 1e-12 * max(1.0, float(np.dot(yv, yv))):
            pairs.append((s, yv, 1.0 / sy))
        del s, yv
        decrease = f - f_new
        x, f, g = x_new, f_new, g_new
        gmax = _abs_max(g)
        history.append((it, gmax))
        if progress is not None:
            progress(FitProgress(it, max_iter, f, gmax, tol,
                                 time.perf_counter() - started, _eta(history, tol, started)))
        if gmax > tol and decrease <= ftol * max(abs(f), 1.0):
            stop = "objective no longer decreasing (relative ftol)"
            break
    converged = gmax <= tol or stop.startswith("objective") or (
        stop.startswith("line search") and gmax <= 10 * tol)
    return x, {"iterations": it, "evaluations": nfev, "converged": bool(converged), "stop": stop,
               "objective": float(f), "gradient_max": gmax, "tol": tol}


def _abs_max(v: np.ndarray) -> float:
    """``max |v_i|`` without a temporary the size of ``v``."""
    return float(max(v.max(), -v.min()))


def _squared_norm(v: np.ndarray) -> float:
    """``v . v`` accumulated in float64 (a float32 dot over millions of entries drifts in
    the last digits the line search compares), in 1 Mi-entry chunks: no full copy."""
    if v.dtype == np.float64:
        return float(np.dot(v, v))
    step = 1 << 20
    return float(sum(np.dot(c, c) for c in (v[a:a + step].astype(np.float64)
                                            for a in range(0, v.size, step))))


def _two_loop(g: np.ndarray, pairs: list[tuple[np.ndarray, np.ndarray, float]],
              inv_d: np.ndarray | None) -> np.ndarray:
    """``-H g`` for the L-BFGS inverse-Hessian estimate ``H`` (Nocedal and Wright,
    algorithm 7.4), with the initial ``H0 = gamma * diag(inv_d)``, ``gamma`` from the
    newest pair. Computed in the precision of ``g`` (``inv_d`` and the pairs match it)."""
    dtype = g.dtype
    q = g.copy()
    alphas = []
    for s, yv, rho in reversed(pairs):
        a = rho * float(np.dot(s, q))
        q -= dtype.type(a) * yv
        alphas.append(a)
    if inv_d is not None:
        q *= inv_d
    if pairs:
        s, yv, rho = pairs[-1]
        yy = float(np.dot(yv * inv_d, yv)) if inv_d is not None else float(np.dot(yv, yv))
        q *= dtype.type(1.0 / (rho * yy))
    for (s, yv, rho), a in zip(pairs, reversed(alphas), strict=True):
        beta = rho * float(np.dot(yv, q))
        q += dtype.type(a - beta) * s
    q *= -1.0
    return q


def _eta(history: list[tuple[int, float]], tol: float, started: float) -> float | None:
    """Seconds left, from the log-gradient's decrease over the last iterations."""
    if len(history) < 6:
        return None
    (i0, g0), (i1, g1) = history[-6], history[-1]
    rate = (math.log(g0) - math.log(g1)) / max(1, i1 - i0)
    if rate <= 0:
        return None
    left = max(0.0, (math.log(g1) - math.log(tol)) / rate)
    per_iter = (time.perf_counter() - started) / max(1, i1)
    return left * per_iter
