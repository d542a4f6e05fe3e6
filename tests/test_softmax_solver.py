"""The own multinomial logistic regression solver (``cascade.models.softmax.fit_softmax``)
against scikit-learn's ``LogisticRegression`` (lbfgs, multinomial) on the same small sparse
problem: both minimize ``C * sum(w_i * loss_i) + ||W||^2 / 2`` with the intercept not
penalized, so their answers must agree.

``fit_softmax`` normalizes the row weights to sum to 1 and uses ``alpha = 1 / (C * total)``
for the L2 term; its objective is then scikit-learn's divided by ``C * total``, a constant,
with the same minimizer. The intercepts are compared after centering: with an unpenalized
intercept, adding a constant to every class's intercept changes no probability.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss

from cascade.models.softmax import FitProgress, compact_columns, fit_softmax, resolve_jobs

N_ROWS, N_COLUMNS, N_CLASSES = 300, 50, 3
COEF_TOL = 1e-3  # max abs difference of any coefficient or centered intercept
TIGHT = {"min_count": 1, "max_iter": 5000, "tol": 1e-10}


@pytest.fixture(scope="module")
def problem() -> tuple[sp.csr_matrix, np.ndarray, np.ndarray]:
    """Sparse rows, labels drawn from a softmax model over them, and uneven row weights
    (summing to more than the row count, so the C scaling matters)."""
    rng = np.random.default_rng(0)
    X = sp.random(N_ROWS, N_COLUMNS, density=0.15, random_state=1, format="csr",
                  data_rvs=lambda m: rng.uniform(0.5, 1.5, m))
    assert (np.bincount(X.indices, minlength=N_COLUMNS) >= 1).all()  # min_count drops none
    z = X @ rng.normal(0.0, 2.0, (N_COLUMNS, N_CLASSES))
    p = np.exp(z - z.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    y = np.array([rng.choice(N_CLASSES, p=row) for row in p])
    weight = rng.uniform(0.2, 3.0, N_ROWS)
    return X, y, weight


def _proba(X: sp.csr_matrix, W: np.ndarray, b: np.ndarray) -> np.ndarray:
    z = X @ W.astype(np.float64) + b
    p = np.exp(z - z.max(axis=1, keepdims=True))
    return p / p.sum(axis=1, keepdims=True)


def _reference(X, y, C, weight=None) -> LogisticRegression:
    # scikit-learn is the reference: lbfgs minimizes C * sum(w_i * loss_i) + ||W||^2 / 2,
    # multinomial for more than two classes, intercept not penalized
    return LogisticRegression(C=C, solver="lbfgs", tol=1e-10, max_iter=10000).fit(
        X, y, sample_weight=weight)


@pytest.mark.parametrize("C", [0.5, 5.0])
def test_coefficients_match_sklearn(problem, C) -> None:
    X, y, _ = problem
    W, b, info = fit_softmax(X, y, N_CLASSES, C=C, **TIGHT)
    ref = _reference(X, y, C)
    assert info["used_columns"] == N_COLUMNS
    # reference: sklearn.linear_model.LogisticRegression, coef_ is (classes, columns)
    assert np.abs(W - ref.coef_.T).max() < COEF_TOL
    assert np.abs((b - b.mean()) - (ref.intercept_ - ref.intercept_.mean())).max() < COEF_TOL


@pytest.mark.parametrize("C", [0.5, 5.0])
def test_weighted_coefficients_match_sklearn(problem, C) -> None:
    # weights summing to ~480 over 300 rows: a C not scaled by the total would be off
    X, y, weight = problem
    W, b, _ = fit_softmax(X, y, N_CLASSES, C=C, sample_weight=weight, **TIGHT)
    ref = _reference(X, y, C, weight)
    # reference: sklearn.linear_model.LogisticRegression with sample_weight
    assert np.abs(W - ref.coef_.T).max() < COEF_TOL
    assert np.abs((b - b.mean()) - (ref.intercept_ - ref.intercept_.mean())).max() < COEF_TOL


@pytest.mark.parametrize("C", [0.5, 5.0])
def test_log_loss_is_close_to_sklearns(problem, C) -> None:
    X, y, _ = problem
    W, b, _ = fit_softmax(X, y, N_CLASSES, C=C, **TIGHT)
    ref = _reference(X, y, C)
    # reference: sklearn.linear_model.LogisticRegression scored by sklearn.metrics.log_loss;
    assert log_loss(y, _proba(X, W, b)) == pytest.approx(log_loss(y, ref.predict_proba(X)),
                                                         abs=1e-5)


def test_a_tight_tol_matches_sklearns_log_loss_within_1e_6(problem) -> None:
    X, y, _ = problem
    W, b, _ = fit_softmax(X, y, N_CLASSES, C=0.5, **TIGHT)
    ref = _reference(X, y, 0.5)
    # reference: sklearn.linear_model.LogisticRegression scored by sklearn.metrics.log_loss;
    # a tight tol must tighten the stop (it once set only the gradient bound)
    assert log_loss(y, _proba(X, W, b)) == pytest.approx(log_loss(y, ref.predict_proba(X)),
                                                         abs=1e-6)


def test_reported_objective_is_the_documented_one_over_c_times_total(problem) -> None:
    X, y, weight = problem
    C = 2.0
    W, b, info = fit_softmax(X, y, N_CLASSES, C=C, sample_weight=weight, **TIGHT)
    p = _proba(X, W, b)
    loss = -np.log(p[np.arange(N_ROWS), y])
    documented = C * float(weight @ loss) + 0.5 * float(np.sum(W.astype(np.float64) ** 2))
    assert info["objective"] == pytest.approx(documented / (C * weight.sum()), rel=1e-6)


def test_the_result_does_not_depend_on_the_number_of_threads(problem) -> None:
    # determinism (project rule): fixed row blocks summed in a fixed order
    X, y, weight = problem
    one = fit_softmax(X, y, N_CLASSES, C=2.0, sample_weight=weight, n_jobs=1)
    two = fit_softmax(X, y, N_CLASSES, C=2.0, sample_weight=weight, n_jobs=2)
    assert np.array_equal(one[0], two[0]) and np.array_equal(one[1], two[1])
    assert one[2]["iterations"] == two[2]["iterations"]


def test_it_runs_to_its_tolerance_and_says_so(problem) -> None:
    X, y, _ = problem
    _, _, info = fit_softmax(X, y, N_CLASSES, C=5.0, tol=1e-5)
    assert info["converged"] and info["gradient_max"] <= 1e-5, info
    _, _, capped = fit_softmax(X, y, N_CLASSES, C=5.0, tol=1e-9, max_iter=3)
    assert not capped["converged"] and capped["iterations"] == 3
    assert capped["stop"].startswith("max_iter")


def test_a_warm_start_at_the_optimum_needs_almost_no_iterations(problem) -> None:
    X, y, _ = problem
    W, b, cold = fit_softmax(X, y, N_CLASSES, C=5.0, tol=1e-5)
    _, _, warm = fit_softmax(X, y, N_CLASSES, C=5.0, tol=1e-5, init=(W, b))
    assert warm["iterations"] <= 2 < cold["iterations"]


def test_progress_is_reported_every_iteration_with_a_gradient_trend(problem) -> None:
    X, y, _ = problem
    seen: list[FitProgress] = []
    _, _, info = fit_softmax(X, y, N_CLASSES, C=5.0, tol=1e-6, progress=seen.append)
    assert [p.iteration for p in seen] == list(range(1, info["iterations"] + 1))
    assert seen[-1].gradient == pytest.approx(info["gradient_max"])
    assert any(p.eta_s is not None for p in seen)


def test_resolve_jobs_follows_scikit_learns_meaning() -> None:
    # scikit-learn glossary, n_jobs: None means 1, -1 all processors, -2 all but one
    assert resolve_jobs(None) == 1
    assert resolve_jobs(1) == 1
    assert 1 <= resolve_jobs(-1) <= 4


def test_fitting_on_chosen_rows_in_place_equals_fitting_on_their_copy(problem) -> None:
    # a calibration fold's training side is read in place (two runs of rows, no copy);
    # it must be the same problem as the copied rows, including the dropped columns
    X, y, weight = problem
    rows = np.concatenate((np.arange(0, 80), np.arange(150, N_ROWS)))
    copied = fit_softmax(X[rows], y[rows], N_CLASSES, C=2.0, sample_weight=weight[rows])
    in_place = fit_softmax(X, y, N_CLASSES, C=2.0, sample_weight=weight, rows=rows)
    # same problem; float32 sums split at other places differ in rounding only
    np.testing.assert_allclose(in_place[0], copied[0], atol=1e-5)
    np.testing.assert_allclose(in_place[1], copied[1], atol=1e-5)
    assert copied[2]["used_columns"] == in_place[2]["used_columns"]
    with pytest.raises(ValueError, match="sorted"):
        fit_softmax(X, y, N_CLASSES, rows=rows[::-1])


def test_columns_below_min_count_get_no_weight(problem) -> None:
    X, y, _ = problem
    counts = np.bincount(X.indices, minlength=N_COLUMNS)
    cut = int(np.sort(counts)[5]) + 1  # the rarest few columns fall below it
    rare = np.flatnonzero(counts < cut)
    assert 0 < rare.size < N_COLUMNS
    W, _, info = fit_softmax(X, y, N_CLASSES, C=2.0, min_count=cut)
    assert not W[rare].any() and info["used_columns"] == N_COLUMNS - rare.size


def test_the_float32_solver_state_reaches_sklearns_log_loss(problem, monkeypatch) -> None:
    # large problems run the solver's vectors in float32; forced here on the small problem
    import cascade.models.softmax as softmax_module

    monkeypatch.setattr(softmax_module, "_PAIR_BYTES", 1024)
    X, y, _ = problem
    W, b, info = fit_softmax(X, y, N_CLASSES, C=0.5, min_count=1, max_iter=5000, tol=1e-6)
    ref = _reference(X, y, 0.5)
    # reference: sklearn.linear_model.LogisticRegression scored by sklearn.metrics.log_loss;
    # float32 steps end within ~5e-6 of its log loss (float64: 5e-7), far inside what a
    # URL model's tol of 3e-4 asks
    assert info["converged"]
    assert log_loss(y, _proba(X, W, b)) == pytest.approx(log_loss(y, ref.predict_proba(X)),
                                                         abs=1e-5)
    assert np.abs(W - ref.coef_.T).max() < COEF_TOL


def test_compact_columns_keeps_frequent_columns_in_place_most_frequent_first() -> None:
    X = sp.csr_matrix(np.array([[1.0, 0, 2.0, 0, 1.0],
                                [0, 0, 1.0, 0, 1.0],
                                [1.0, 3.0, 1.0, 0, 0]], dtype=np.float32))
    indices = X.indices
    compact, used = compact_columns(X, min_count=2)
    # column counts 2, 1, 3, 0, 2: kept 2, 0, 4 (ties in column order), the rest dropped
    assert used.tolist() == [2, 0, 4] and compact.shape == (3, 4)
    assert compact.indices.base is indices.base or compact.indices is indices  # in place
    expected = np.array([[2.0, 1.0, 1.0, 0], [1.0, 0, 1.0, 0], [1.0, 1.0, 0, 0]])
    assert np.array_equal(compact.toarray(), expected)  # column 1's 3.0 is gone


def test_a_fit_on_compact_columns_equals_the_fit_that_drops_them(problem) -> None:
    X, y, _ = problem
    rare = X.tolil()
    rare[:, 7] = 0.0  # make column 7 rare: one entry left
    rare[0, 7] = 1.0
    rare = rare.tocsr()
    W, b, info = fit_softmax(rare, y, N_CLASSES, C=2.0, **{**TIGHT, "min_count": 2})
    compact, used = compact_columns(rare.copy(), min_count=2)
    Wc, bc, _ = fit_softmax(compact, y, N_CLASSES, C=2.0, **{**TIGHT, "min_count": 0})
    full = np.zeros_like(W)
    full[used] = Wc[:len(used)]
    assert 7 not in used and info["used_columns"] == len(used) == N_COLUMNS - 1
    # the same problem: the same optimum, up to where each run stopped
    assert np.abs(full - W).max() < COEF_TOL and np.abs(bc - b).max() < COEF_TOL


def test_the_row_blocks_read_the_rows_in_place(problem) -> None:
    # a calibration fold's training side is read without copying its rows (scipy copies
    # slices of a larger array when it builds a matrix from them: not here)
    from cascade.models.softmax import _Products, _runs

    X, _, _ = problem
    X32 = X.astype(np.float32)
    rows = np.concatenate((np.arange(0, 100), np.arange(200, N_ROWS)))
    products = _Products(X32, _runs(rows), None, N_COLUMNS, 1)
    views = [view for block in products.blocks for _, _, view in block]
    assert sum(v.shape[0] for v in views) == len(rows)
    assert all(np.shares_memory(v.data, X32.data) and np.shares_memory(v.indices, X32.indices)
               for v in views)
