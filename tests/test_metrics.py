"""Tests for cascade.metrics: each metric against sklearn.metrics, plus hand-worked cases."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.metrics import accuracy_score, f1_score, roc_auc_score, roc_curve

from cascade import metrics as M


def _softmax(z: np.ndarray) -> np.ndarray:
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def _case(seed: int, n: int = 400, k: int = 4) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Random labels, informative but noisy probabilities, and integer lookup counts."""
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    logits = rng.normal(size=(n, k))
    logits[np.arange(n), y] += 1.5
    proba = _softmax(logits)
    weights = rng.integers(1, 1000, n).astype(float)
    return y, proba, weights


def _tied_case(seed: int, n: int = 300, k: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Probability rows drawn from a pool of 5, so every column is full of ties."""
    rng = np.random.default_rng(seed)
    pool = rng.dirichlet(np.ones(k), size=5)
    proba = pool[rng.integers(0, 5, n)]
    y = rng.integers(0, k, n)
    weights = rng.uniform(0.1, 5.0, n)
    return y, proba, weights


def _present(y: np.ndarray, pred: np.ndarray, w: np.ndarray | None = None) -> list[int]:
    if w is None:
        return sorted(set(y.tolist()) | set(pred.tolist()))
    keep = w > 0
    return sorted(set(y[keep].tolist()) | set(pred[keep].tolist()))


SEEDS = [0, 1, 2]


# ------------------------------------------------------------------------ accuracy


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("weighted", [False, True])
def test_accuracy_matches_sklearn(seed: int, weighted: bool) -> None:
    y, proba, w = _case(seed)
    pred = proba.argmax(axis=1)
    sw = w if weighted else None
    # sklearn.metrics.accuracy_score as the reference
    assert M.accuracy(y, pred, sw) == pytest.approx(accuracy_score(y, pred, sample_weight=sw))


def test_accuracy_all_correct() -> None:
    y = np.array([0, 1, 2, 2])
    assert M.accuracy(y, y) == 1.0
    assert M.accuracy(y, y, [1, 2, 3, 4]) == 1.0


# ------------------------------------------------------------------------------ F1


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("weighted", [False, True])
def test_macro_f1_matches_sklearn(seed: int, weighted: bool) -> None:
    y, proba, w = _case(seed)
    pred = proba.argmax(axis=1)
    sw = w if weighted else None
    # sklearn.metrics.f1_score(average="macro", labels=<present>, zero_division=0) as the reference
    ref = f1_score(
        y, pred, average="macro", labels=_present(y, pred), sample_weight=sw, zero_division=0
    )
    assert M.macro_f1(y, pred, 4, sw) == pytest.approx(ref)


@pytest.mark.parametrize("weighted", [False, True])
def test_f1_per_class_matches_sklearn_and_marks_absent_classes(weighted: bool) -> None:
    # Six classes: 4 appears only in y_pred, 5 appears nowhere.
    y, proba, w = _case(3, n=200, k=4)
    pred = proba.argmax(axis=1)
    pred[:3] = 4
    sw = w if weighted else None
    got = M.f1_per_class(y, pred, 6, sw)
    assert np.isnan(got[5])
    assert got[4] == 0.0
    # sklearn.metrics.f1_score(average=None, zero_division=0) as the reference
    ref = f1_score(y, pred, average=None, labels=[0, 1, 2, 3, 4], sample_weight=sw,
                   zero_division=0)
    np.testing.assert_allclose(got[:5], ref, rtol=1e-12)
    # sklearn.metrics.f1_score(average="macro", labels=<present>, zero_division=0) as the reference
    ref_macro = f1_score(y, pred, average="macro", labels=[0, 1, 2, 3, 4], sample_weight=sw,
                         zero_division=0)
    assert M.macro_f1(y, pred, 6, sw) == pytest.approx(ref_macro)


def test_macro_f1_class_absent_from_everything_is_left_out() -> None:
    y = np.array([0, 0, 1, 1, 2])
    pred = np.array([0, 1, 1, 1, 2])
    # Classes 3 and 4 exist in the taxonomy but not in the data: they must not count as 0.
    # sklearn.metrics.f1_score(average="macro", labels=[0, 1, 2]) as the reference
    ref = f1_score(y, pred, average="macro", labels=[0, 1, 2], zero_division=0)
    assert M.macro_f1(y, pred, 5) == pytest.approx(ref)
    assert M.macro_f1(y, pred, 3) == pytest.approx(ref)


def test_macro_f1_all_correct() -> None:
    y = np.array([0, 3, 3, 1])
    assert M.macro_f1(y, y, 4) == 1.0


# ------------------------------------------------------------------------- ROC AUC


def _ref_auc(
    y: np.ndarray, proba: np.ndarray, sw: np.ndarray | None, classes: list[int] | None = None
) -> np.ndarray:
    classes = list(range(proba.shape[1])) if classes is None else classes
    # sklearn.metrics.roc_auc_score on each one-vs-rest column as the reference
    return np.array([roc_auc_score(y == c, proba[:, c], sample_weight=sw) for c in classes])


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("make", [_case, _tied_case])
def test_roc_auc_matches_sklearn(seed: int, weighted: bool, make) -> None:
    y, proba, w = make(seed)
    sw = w if weighted else None
    # reference: roc_auc_score per column (see _ref_auc)
    np.testing.assert_allclose(M.roc_auc_one_vs_rest(y, proba, sw), _ref_auc(y, proba, sw),
                               rtol=1e-12)


def test_roc_auc_nan_for_absent_class_and_for_class_without_negatives() -> None:
    y, proba, _ = _case(4, n=100, k=3)
    y[y == 2] = 0  # class 2 has no positives
    got = M.roc_auc_one_vs_rest(y, proba)
    assert np.isnan(got[2])
    # reference: roc_auc_score per column (see _ref_auc)
    np.testing.assert_allclose(got[:2], _ref_auc(y, proba, None, [0, 1]), rtol=1e-12)

    every = np.zeros(100, dtype=int)  # class 0 everywhere: no negatives for 0, no positives else
    assert np.isnan(M.roc_auc_one_vs_rest(every, proba)).all()


def test_roc_auc_perfect_separation_and_full_tie() -> None:
    y = np.array([0, 0, 1, 1])
    proba = np.array([[0.9, 0.1], [0.8, 0.2], [0.3, 0.7], [0.4, 0.6]])
    np.testing.assert_array_equal(M.roc_auc_one_vs_rest(y, proba), [1.0, 1.0])
    flat = np.full((4, 2), 0.5)
    np.testing.assert_array_equal(M.roc_auc_one_vs_rest(y, flat), [0.5, 0.5])


# ---------------------------------------------------------------------- TPR @ FPR


def _ref_tpr_at_fpr(y, proba, max_fpr, sw) -> np.ndarray:
    out = []
    for c in range(proba.shape[1]):
        # sklearn.metrics.roc_curve(drop_intermediate=False) as the reference: best TPR
        # among the ROC points (including its (0, 0) start) with FPR <= max_fpr
        fpr, tpr, _ = roc_curve(y == c, proba[:, c], sample_weight=sw, drop_intermediate=False)
        out.append(tpr[fpr <= max_fpr].max())
    return np.array(out)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("make", [_case, _tied_case])
@pytest.mark.parametrize("max_fpr", [0.0, 1e-3, 1e-2, 0.1, 0.5, 1.0])
def test_tpr_at_fpr_matches_sklearn_roc_curve(seed, weighted, make, max_fpr) -> None:
    y, proba, w = make(seed)
    sw = w if weighted else None
    # reference: roc_curve step function (see _ref_tpr_at_fpr)
    np.testing.assert_allclose(
        M.tpr_at_fpr(y, proba, max_fpr, sw), _ref_tpr_at_fpr(y, proba, max_fpr, sw), rtol=1e-12
    )


def test_tpr_at_fpr_hand_worked_step() -> None:
    # Worked by hand from the definition. Class 1 scores: negatives 0.9, 0.5, 0.3, 0.1;
    # positives 0.8, 0.7, 0.4. Threshold 0.7 flags one negative (FPR 1/4) and two of three
    # positives; threshold 0.4 is the first to reach TPR 1, at FPR 2/4.
    p1 = np.array([0.9, 0.5, 0.3, 0.1, 0.8, 0.7, 0.4])
    y = np.array([0, 0, 0, 0, 1, 1, 1])
    proba = np.column_stack([1 - p1, p1])
    got = lambda f: M.tpr_at_fpr(y, proba, f)[1]  # noqa: E731
    assert got(0.2) == 0.0  # only the flag-nothing threshold fits
    assert got(0.25) == pytest.approx(2 / 3)
    assert got(0.49) == pytest.approx(2 / 3)  # a step, not interpolated towards (0.5, 1)
    assert got(0.5) == 1.0


def test_tpr_at_fpr_nan_where_undefined_and_bad_budget() -> None:
    y, proba, _ = _case(5, n=50, k=3)
    y[y == 1] = 0
    assert np.isnan(M.tpr_at_fpr(y, proba, 0.01)[1])
    with pytest.raises(ValueError, match="max_fpr"):
        M.tpr_at_fpr(y, proba, 1.5)


# -------------------------------------------------------- weights: absent / repeated


def test_zero_weight_rows_behave_as_absent() -> None:
    y, proba, w = _case(6, n=300)
    w[::7] = 0.0
    keep = w > 0
    pred = proba.argmax(axis=1)
    yk, pk, wk, predk = y[keep], proba[keep], w[keep], pred[keep]
    assert M.accuracy(y, pred, w) == pytest.approx(M.accuracy(yk, predk, wk))
    assert M.macro_f1(y, pred, 4, w) == pytest.approx(M.macro_f1(yk, predk, 4, wk))
    np.testing.assert_allclose(M.roc_auc_one_vs_rest(y, proba, w),
                               M.roc_auc_one_vs_rest(yk, pk, wk))
    np.testing.assert_allclose(M.tpr_at_fpr(y, proba, 0.05, w), M.tpr_at_fpr(yk, pk, 0.05, wk))
    assert M.expected_calibration_error(y, proba, sample_weight=w) == pytest.approx(
        M.expected_calibration_error(yk, pk, sample_weight=wk))
    assert M.coverage_at_precision(y, proba, 0.8, w) == pytest.approx(
        M.coverage_at_precision(yk, pk, 0.8, wk))
    for a, b in zip(M.risk_coverage_curve(y, proba, w), M.risk_coverage_curve(yk, pk, wk),
                    strict=True):
        np.testing.assert_allclose(a, b)


def test_integer_weights_equal_repeated_rows() -> None:
    y, proba, _ = _case(7, n=120)
    w = np.random.default_rng(7).integers(1, 4, 120)
    yr, pr = np.repeat(y, w), np.repeat(proba, w, axis=0)
    np.testing.assert_allclose(M.roc_auc_one_vs_rest(y, proba, w), M.roc_auc_one_vs_rest(yr, pr))
    np.testing.assert_allclose(M.tpr_at_fpr(y, proba, 0.1, w), M.tpr_at_fpr(yr, pr, 0.1))
    assert M.expected_calibration_error(y, proba, sample_weight=w) == pytest.approx(
        M.expected_calibration_error(yr, pr))
    assert M.coverage_at_precision(y, proba, 0.7, w) == pytest.approx(
        M.coverage_at_precision(yr, pr, 0.7))


# ---------------------------------------------------------------------- calibration


# Six rows, three classes. Top-label confidence / right?: 0.9 yes, 0.9 no, 0.8 yes (on an
# edge), 0.7 no, 0.5 yes, 0.4 no (on an edge).
_ECE_PROBA = np.array([
    [0.9, 0.05, 0.05],
    [0.05, 0.9, 0.05],
    [0.8, 0.1, 0.1],
    [0.2, 0.7, 0.1],
    [0.5, 0.3, 0.2],
    [0.4, 0.3, 0.3],
])
_ECE_Y = np.array([0, 0, 0, 2, 0, 1])


def test_ece_hand_worked() -> None:
    # Worked by hand from the definition: top-label ECE with equal-width bins, as in
    # Guo et al. 2017 "On Calibration of Modern Neural Networks". With 5 bins, (lo, hi]:
    #   (0.8, 1.0]: 0.9 yes, 0.9 no  -> acc 1/2, conf 0.90, gap 0.40, share 2/6
    #   (0.6, 0.8]: 0.8 yes, 0.7 no  -> acc 1/2, conf 0.75, gap 0.25, share 2/6
    #   (0.4, 0.6]: 0.5 yes          -> acc 1,   conf 0.50, gap 0.50, share 1/6
    #   (0.2, 0.4]: 0.4 no           -> acc 0,   conf 0.40, gap 0.40, share 1/6
    # ECE = (2*0.40 + 2*0.25 + 0.50 + 0.40) / 6 = 2.2 / 6
    assert M.expected_calibration_error(_ECE_Y, _ECE_PROBA, n_bins=5) == pytest.approx(2.2 / 6)

    # Worked by hand, weights 1, 3, 1, 1, 2, 1 (total 9):
    #   (0.8, 1.0]: acc 1/4, conf 0.90, gap 0.65, weight 4
    #   (0.6, 0.8]: acc 1/2, conf 0.75, gap 0.25, weight 2
    #   (0.4, 0.6]: acc 1,   conf 0.50, gap 0.50, weight 2
    #   (0.2, 0.4]: acc 0,   conf 0.40, gap 0.40, weight 1
    # ECE = (2.6 + 0.5 + 1.0 + 0.4) / 9 = 0.5
    w = np.array([1, 3, 1, 1, 2, 1])
    assert M.expected_calibration_error(_ECE_Y, _ECE_PROBA, 5, w) == pytest.approx(0.5)


def test_reliability_table_hand_worked() -> None:
    # Same rows and bins as test_ece_hand_worked, worked by hand.
    t = M.reliability_table(_ECE_Y, _ECE_PROBA, n_bins=5)
    np.testing.assert_allclose(t.lo, [0.0, 0.2, 0.4, 0.6, 0.8])
    np.testing.assert_allclose(t.hi, [0.2, 0.4, 0.6, 0.8, 1.0])
    np.testing.assert_array_equal(t.count, [0, 1, 1, 2, 2])
    np.testing.assert_array_equal(t.weight, [0, 1, 1, 2, 2])
    np.testing.assert_allclose(t.mean_confidence, [np.nan, 0.4, 0.5, 0.75, 0.9])
    np.testing.assert_allclose(t.accuracy, [np.nan, 0.0, 1.0, 0.5, 0.5])
    rows = t.to_rows()
    assert rows[0]["accuracy"] is None and rows[0]["count"] == 0
    json.dumps(rows, allow_nan=False)


def test_bin_edges_are_right_closed_and_zero_joins_first_bin() -> None:
    edges = M._bin_edges(15)
    conf = np.array([0.0, 1e-9, 1 / 15, 1 / 15 + 1e-12, 0.5, 14 / 15, 1.0])
    np.testing.assert_array_equal(M._bin_indices(conf, edges), [0, 0, 0, 1, 7, 13, 14])


def test_ece_perfectly_calibrated_sample_is_small() -> None:
    rng = np.random.default_rng(2017)
    n, k = 200_000, 4
    proba = rng.dirichlet(np.full(k, 0.7), size=n)
    # Labels drawn from the probabilities themselves: calibrated by construction.
    y = (rng.random(n)[:, None] > np.cumsum(proba, axis=1)).sum(axis=1).clip(0, k - 1)
    assert M.expected_calibration_error(y, proba) < 0.02
    # Sharpened probabilities on the same labels are overconfident and must score worse.
    sharp = proba**3 / (proba**3).sum(axis=1, keepdims=True)
    assert M.expected_calibration_error(y, sharp) > 0.05


def test_ece_fully_overconfident() -> None:
    # Worked by hand: every row says 1.0 and half are wrong, so ECE = |0.5 - 1.0|.
    y = np.array([0, 1, 0, 1])
    proba = np.array([[1.0, 0.0]] * 4)
    assert M.expected_calibration_error(y, proba) == pytest.approx(0.5)


def test_reliability_matches_sklearn_calibration_curve_binary() -> None:
    # With p(class 1) > 0.5 on every row, the top label is always class 1, so the
    # top-label table is the binary calibration curve of class 1.
    rng = np.random.default_rng(11)
    p1 = rng.uniform(0.5 + 1e-9, 1.0, 3000)
    p1[:8] = np.arange(8, 16) / 15  # confidences exactly on bin edges, and 1.0
    y = (rng.random(3000) < p1).astype(int)
    proba = np.column_stack([1 - p1, p1])
    t = M.reliability_table(y, proba, n_bins=15)
    # sklearn.calibration.calibration_curve(strategy="uniform") as the reference
    frac_pos, mean_pred = calibration_curve(y, p1, n_bins=15, strategy="uniform")
    filled = t.count > 0
    np.testing.assert_allclose(t.accuracy[filled], frac_pos, rtol=1e-12)
    np.testing.assert_allclose(t.mean_confidence[filled], mean_pred, rtol=1e-12)


def test_n_bins_must_be_positive() -> None:
    with pytest.raises(ValueError, match="n_bins"):
        M.expected_calibration_error(_ECE_Y, _ECE_PROBA, n_bins=0)


# ---------------------------------------------------------- selective prediction


# Binary rows; top-label confidence / right?, already in descending order:
# 0.95 yes | 0.9 no, 0.9 yes (a tie) | 0.8 yes | 0.7 no | 0.6 yes
_SEL_CONF = np.array([0.95, 0.9, 0.9, 0.8, 0.7, 0.6])
_SEL_RIGHT = np.array([True, False, True, True, False, True])
_SEL_PROBA = np.column_stack([_SEL_CONF, 1 - _SEL_CONF])  # top label is always class 0
_SEL_Y = np.where(_SEL_RIGHT, 0, 1)


def test_coverage_at_precision_hand_worked() -> None:
    # Worked by hand: prefix accuracies at each distinct confidence are
    # 0.95 -> 1/1, 0.9 -> 2/3, 0.8 -> 3/4, 0.7 -> 3/5, 0.6 -> 4/6.
    f = lambda t: M.coverage_at_precision(_SEL_Y, _SEL_PROBA, t)  # noqa: E731
    assert f(1.0) == (pytest.approx(1 / 6), 0.95)
    # Splitting the 0.9 tie would give 2/2 rows right; ties are never split.
    assert f(0.9) == (pytest.approx(1 / 6), 0.95)
    # The largest qualifying prefix wins even though a shorter one (2/3) fails.
    assert f(0.75) == (pytest.approx(4 / 6), 0.8)
    assert f(0.6) == (1.0, 0.6)
    assert f(0.0) == (1.0, 0.6)


def test_coverage_at_precision_none_qualifies() -> None:
    y = np.array([1, 0])
    proba = np.array([[1.0, 0.0], [0.8, 0.2]])  # the most confident row is wrong
    assert M.coverage_at_precision(y, proba, 1.0) == (0.0, math.inf)


def test_coverage_at_precision_order_of_tied_rows_does_not_matter() -> None:
    perm = np.array([0, 2, 1, 3, 4, 5])  # right row of the tie first this time
    assert M.coverage_at_precision(_SEL_Y[perm], _SEL_PROBA[perm], 0.9) == (
        pytest.approx(1 / 6), 0.95)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("target", [0.5, 0.8, 0.95])
@pytest.mark.parametrize("make", [_case, _tied_case])
def test_coverage_at_precision_matches_brute_force(seed, target, make) -> None:
    y, proba, w = make(seed)
    conf = proba.max(axis=1)
    right = proba.argmax(axis=1) == y
    for sw in (None, w):
        ww = np.ones_like(conf) if sw is None else sw
        best = (0.0, math.inf)
        # Brute force over every distinct threshold, written independently of the module.
        for t in np.unique(conf):
            m = conf >= t
            if ww[m] @ right[m] / ww[m].sum() >= target and ww[m].sum() / ww.sum() > best[0]:
                best = (ww[m].sum() / ww.sum(), t)
        cov, thr = M.coverage_at_precision(y, proba, target, sw)
        assert cov == pytest.approx(best[0])
        assert thr == best[1]


def test_risk_coverage_curve_hand_worked() -> None:
    # Worked by hand from the prefix accuracies in test_coverage_at_precision_hand_worked.
    cov, risk = M.risk_coverage_curve(_SEL_Y, _SEL_PROBA)
    np.testing.assert_allclose(cov, [1 / 6, 3 / 6, 4 / 6, 5 / 6, 1.0])
    np.testing.assert_allclose(risk, [0.0, 1 / 3, 1 / 4, 2 / 5, 1 / 3])


def test_coverage_target_validated() -> None:
    with pytest.raises(ValueError, match="target"):
        M.coverage_at_precision(_SEL_Y, _SEL_PROBA, 1.1)


# ------------------------------------------------------------------------ summary


def test_summarize_is_json_ready_and_consistent() -> None:
    y, proba, w = _case(8, n=300, k=4)
    proba = np.column_stack([proba, np.zeros(300)])  # class "e" is never seen
    names = ["a", "b", "c", "d", "e"]
    s = M.summarize(y, proba, names)
    json.dumps(s, allow_nan=False)
    assert "weighted" not in s
    assert s["n"] == 300 and s["n_classes"] == 5
    pred = proba.argmax(axis=1)
    assert s["accuracy"] == pytest.approx(M.accuracy(y, pred))
    assert s["macro_f1"] == pytest.approx(M.macro_f1(y, pred, 5))
    assert s["ece_15"] == pytest.approx(M.expected_calibration_error(y, proba))
    aucs = M.roc_auc_one_vs_rest(y, proba)
    assert s["mean_roc_auc"] == pytest.approx(np.nanmean(aucs))
    e = s["per_class"]["e"]
    assert {k: e[k] for k in ("roc_auc", "tpr_at_fpr_1e-2", "support", "f1", "precision",
                              "recall")} == {"roc_auc": None, "tpr_at_fpr_1e-2": None,
                                             "support": 0, "f1": None, "precision": None,
                                             "recall": None}
    # 300 rows cannot measure a false-positive rate of 1e-3: said, not a number
    assert e["tpr_at_fpr_1e-3"] is None and "1000 negatives" in e["not_measurable"][0]
    # reference: sklearn.metrics.precision_recall_fscore_support and confusion_matrix
    from sklearn.metrics import confusion_matrix, precision_recall_fscore_support

    prec, rec, _, _ = precision_recall_fscore_support(y, pred, labels=[0, 1, 2, 3],
                                                      zero_division=0)
    assert s["per_class"]["b"]["precision"] == pytest.approx(prec[1])
    assert s["per_class"]["b"]["recall"] == pytest.approx(rec[1])
    assert s["confusion"]["matrix"] == confusion_matrix(y, pred, labels=range(5)).tolist()
    lo, hi = s["intervals_95"]["accuracy"]
    assert lo <= s["accuracy"] <= hi
    assert s["per_class"]["b"]["support"] == int((y == 1).sum())
    assert s["per_class"]["b"]["tpr_at_fpr_1e-2"] == pytest.approx(
        M.tpr_at_fpr(y, proba, 1e-2)[1])
    cap = s["coverage_at_precision"]
    assert cap["target"] == 0.9
    assert (cap["coverage"], cap["threshold"]) == pytest.approx(
        M.coverage_at_precision(y, proba, 0.9))


def test_summarize_weighted_block() -> None:
    y, proba, w = _case(9, n=300, k=3)
    names = ["x", "y", "z"]
    s = M.summarize(y, proba, names, sample_weight=w, precision_target=0.8)
    json.dumps(s, allow_nan=False)
    wd = s["weighted"]
    assert wd["total_weight"] == pytest.approx(w.sum())
    pred = proba.argmax(axis=1)
    # sklearn.metrics.accuracy_score(sample_weight=...) as the reference
    assert wd["accuracy"] == pytest.approx(accuracy_score(y, pred, sample_weight=w))
    assert wd["ece_15"] == pytest.approx(M.expected_calibration_error(y, proba, 15, w))
    assert wd["coverage_at_precision"]["target"] == 0.8
    # With all-ones weights the weighted block repeats the per-URL figures.
    ones = M.summarize(y, proba, names, sample_weight=np.ones(300))
    for key in ("accuracy", "macro_f1", "ece_15", "mean_roc_auc"):
        assert ones["weighted"][key] == pytest.approx(ones[key])
    assert ones["weighted"]["coverage_at_precision"] == ones["coverage_at_precision"]


def test_summarize_threshold_none_when_nothing_qualifies() -> None:
    y = np.array([1, 0])
    proba = np.array([[1.0, 0.0], [0.8, 0.2]])
    s = M.summarize(y, proba, ["p", "q"], precision_target=1.0)
    assert s["coverage_at_precision"] == {"target": 1.0, "coverage": 0.0, "threshold": None}
    json.dumps(s, allow_nan=False)


# --------------------------------------------------------------------- validation

_Y = np.array([0, 1, 1])
_P = np.array([[0.7, 0.3], [0.2, 0.8], [0.5, 0.5]])


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: M.roc_auc_one_vs_rest(_Y[:, None], _P), "1-D"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P[:2]), "rows"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P[:, 0]), "2-D"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P * 1.1), "sum to 1"),
        (lambda: M.roc_auc_one_vs_rest(_Y, np.where(_P == 0.5, np.nan, _P)), "NaN"),
        (lambda: M.roc_auc_one_vs_rest(_Y.astype(float), _P), "integer"),
        (lambda: M.roc_auc_one_vs_rest(np.array([0, 1, 2]), _P), "columns"),
        (lambda: M.roc_auc_one_vs_rest(np.array([], dtype=int), _P[:0]), "empty"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P, [1, -1, 1]), "negative"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P, [1, 1]), "sample_weight"),
        (lambda: M.roc_auc_one_vs_rest(_Y, _P, [0, 0, 0]), "sums to zero"),
        (lambda: M.accuracy(_Y, _Y[:2]), "y_pred"),
        (lambda: M.accuracy(np.array([-1, 0, 1]), _Y), "negative"),
        (lambda: M.macro_f1(_Y, np.array([0, 1, 2]), 2), "outside"),
        (lambda: M.macro_f1(_Y, _Y, 0), "n_classes"),
        (lambda: M.summarize(_Y, _P, ["only-one"]), "class names"),
        (lambda: M.summarize(_Y, _P, ["a", "a"]), "duplicates"),
        (lambda: M.summarize(_Y, _P, ["a", "b"], precision_target=2), "precision_target"),
    ],
)
def test_bad_input_raises_value_error(call, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        call()


def test_bootstrap_intervals_equal_resampling_the_rows_themselves() -> None:
    # the count-per-row form must give what resampling the rows and recomputing the
    # metrics with this module's own (sklearn-checked) functions gives, draw for draw
    y, proba, _ = _case(3, n=400, k=4)
    got = M.bootstrap_intervals(y, proba, n_boot=60, seed=0)
    rng = np.random.default_rng(0)
    pred = proba.argmax(axis=1)
    draws = {"accuracy": [], "macro_f1": [], "ece_15": []}
    for _ in range(60):
        i = rng.integers(0, len(y), len(y))
        draws["accuracy"].append(M.accuracy(y[i], pred[i]))
        draws["macro_f1"].append(M.macro_f1(y[i], pred[i], 4))
        draws["ece_15"].append(M.expected_calibration_error(y[i], proba[i], 15))
    for name, values in draws.items():
        assert got[name] == pytest.approx([np.percentile(values, 2.5),
                                           np.percentile(values, 97.5)], abs=1e-9), name
