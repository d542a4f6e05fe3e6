"""The budget report: curves against sklearn.metrics, the strategies' defining properties,
and a self-contained HTML file with every plot embedded."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, roc_curve

from cascade.report import (
    STRATEGIES,
    _html,
    budget_curve,
    budget_for_share,
    build_report,
    strategy_orders,
    write_report,
)
from tests.test_budget import _synthetic


@pytest.fixture(scope="module")
def data():
    y, pu, pf = _synthetic(800, k=4, seed=7)
    gain = 1.0 - pu.max(axis=1) + np.random.default_rng(0).normal(0, 0.05, len(y))
    return y, pu, pf, gain


@pytest.fixture(scope="module")
def big():
    """Enough rows that every class has the 1,000 negatives a TPR at FPR 1e-3 needs."""
    y, pu, pf = _synthetic(2500, k=4, seed=7)
    gain = 1.0 - pu.max(axis=1) + np.random.default_rng(0).normal(0, 0.05, len(y))
    return y, pu, pf, gain


def test_curve_ends_equal_url_only_and_fetch_all_accuracy(data) -> None:
    y, pu, pf, gain = data
    order = strategy_orders(y, pu, pf, gain)["planner"]
    cur = budget_curve(y, pu, pf, order, [0.0, 1.0])
    # reference: sklearn.metrics.accuracy_score
    assert cur["accuracy"][0] == pytest.approx(accuracy_score(y, pu.argmax(1)))
    assert cur["accuracy"][1] == pytest.approx(accuracy_score(y, pf.argmax(1)))


def test_partial_budget_matches_sklearn_on_the_mixed_verdicts(data) -> None:
    y, pu, pf, gain = data
    order = strategy_orders(y, pu, pf, gain)["lowest-confidence"]
    m = 240
    mixed = pu.argmax(1).copy()
    mixed[order[:m]] = pf[order[:m]].argmax(1)
    w = np.random.default_rng(1).integers(1, 50, len(y)).astype(float)
    cur = budget_curve(y, pu, pf, order, [m / len(y)], counts=w)
    # reference: sklearn.metrics.accuracy_score with sample_weight (lookup volume)
    assert cur["accuracy"][0] == pytest.approx(accuracy_score(y, mixed, sample_weight=w))


def test_cost_weighted_error_weights_by_true_category_cost(data) -> None:
    y, pu, pf, gain = data
    costs = np.array([1.0, 1.0, 1.0, 5.0])
    cur = budget_curve(y, pu, pf, np.arange(len(y)), [0.0], costs=costs)
    wrong = pu.argmax(1) != y
    expected = (costs[y] * wrong).sum() / costs[y].sum()  # definition, computed by hand
    assert cur["cost_weighted_error"][0] == pytest.approx(expected)


def test_lowest_confidence_order_and_oracle_ceiling(data) -> None:
    y, pu, pf, gain = data
    orders = strategy_orders(y, pu, pf, gain)
    conf = pu.max(1)
    assert np.all(np.diff(conf[orders["lowest-confidence"]]) >= 0)
    fixes = (pf.argmax(1) == y) & (pu.argmax(1) != y)
    assert set(orders["oracle"]) == set(np.flatnonzero(fixes))
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=3)
    for j in range(len(rep["curves"]["budget"])):
        oracle = rep["curves"]["oracle"]["accuracy"][j]
        assert all(oracle >= rep["curves"][s]["accuracy"][j] - 1e-12 for s in STRATEGIES)


def test_budget_for_share() -> None:
    f = [0.0, 0.1, 0.2, 0.3, 1.0]
    assert budget_for_share(f, [0.5, 0.7, 0.85, 0.9, 0.9], 0.9) == 0.3
    assert budget_for_share(f, [0.5, 0.7, 0.85, 0.9, 0.9], 0.5) == 0.1
    assert budget_for_share(f, [0.5, 0.5, 0.5, 0.5, 0.5], 0.9) is None


def test_report_roc_points_are_sklearn_roc_curve(big) -> None:
    y, pu, pf, gain = big
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=2)
    fpr, tpr, _ = roc_curve(y == 2, pu[:, 2], drop_intermediate=True)  # reference: sklearn
    pts = rep["roc"]["url_only"]["c"]
    assert pts["fpr"][-1] == pytest.approx(fpr[-1]) and pts["tpr"][-1] == pytest.approx(tpr[-1])
    # TPR at FPR 1e-3 from the ROC points: best TPR with FPR <= 1e-3.
    full_fpr, full_tpr, _ = roc_curve(y == 2, pu[:, 2], drop_intermediate=False)
    expected = full_tpr[full_fpr <= 1e-3].max()
    row = next(r for r in rep["per_class"] if r["category"] == "c")
    assert row["tpr_at_fpr_0.001_url"] == pytest.approx(expected, abs=1e-4)


def test_report_json_and_self_contained_html(data, tmp_path) -> None:
    y, pu, pf, gain = data
    counts = np.random.default_rng(2).integers(1, 100, len(y))
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], counts=counts, seeds=2)
    paths = write_report(rep, tmp_path / "r")
    back = json.loads(paths["json"].read_text())
    assert [r["budget"] for r in back["budget_table"]] == [0.0, 0.05, 0.1, 0.2, 0.3, 0.5, 1.0]
    assert back["weighted_by_lookups"] is True
    page = paths["html"].read_text()
    imgs = re.findall(r'<img [^>]*src="data:image/png;base64,', page)
    # budget accuracy, risk-coverage, ROC, reliability; no cost-weighted error plot with
    # unit costs (it would repeat 1 - accuracy)
    assert len(imgs) == 4 and back["unit_costs"] is True
    # Self-contained: nothing loaded from elsewhere.
    assert not re.search(r'(src|href)="(https?:)?//', page)
    for fid in ("budget-accuracy", "risk-coverage", "roc", "reliability"):
        assert paths[fid].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "policy owner" in page


def test_planner_order_weights_gain_by_lookups(data) -> None:
    y, pu, pf, gain = data
    counts = np.ones(len(y))
    positive = np.flatnonzero(gain > 0)
    j = int(positive[np.argmin(gain[positive])])
    counts[j] = 1e6  # the least promising URL still worth a fetch, looked up a million times
    assert strategy_orders(y, pu, pf, gain, counts)["planner"][0] == j
    assert strategy_orders(y, pu, pf, gain, counts)["lowest-confidence"][0] != j or \
        pu[j].max() == pu.max(1).min()


def test_accuracy_oracle_is_the_ceiling_even_with_unequal_costs(data) -> None:
    y, pu, pf, gain = data
    costs = np.array([10.0, 1.0, 1.0, 1.0])
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], costs=costs, seeds=2)
    for j in range(len(rep["curves"]["budget"])):
        for metric, better in (("accuracy", max), ("cost_weighted_error", min)):
            oracle = rep["curves"]["oracle"][metric][j]
            assert better(oracle, *(rep["curves"][s][metric][j] for s in STRATEGIES)) == oracle


def test_bad_budget_shares_and_seeds_are_refused(data) -> None:
    y, pu, pf, gain = data
    for kw in ({"budgets": (0.0, -0.05)}, {"budgets": (1.5,)}, {"operating_budget": -0.3},
               {"seeds": 0}):
        with pytest.raises(ValueError):
            build_report(y, pu, pf, gain, ["a", "b", "c", "d"], **kw)
    with pytest.raises(ValueError, match="class names"):
        build_report(y, pu, pf, gain, ["a", "b"])


def test_budget_shares_round_down_like_the_planner(data) -> None:
    from cascade.budget import Budget

    y, pu, pf, gain = data
    n = len(y)
    order = strategy_orders(y, pu, pf, gain)["planner"]
    for share in (0.3, 0.125, 0.333):
        m = Budget(max_fraction=share).count_limit(n)
        mixed = pu.argmax(1).copy()
        mixed[order[:m]] = pf[order[:m]].argmax(1)
        got = budget_curve(y, pu, pf, order, [share])["accuracy"][0]
        assert got == pytest.approx(accuracy_score(y, mixed))  # reference: sklearn.metrics


def test_weighted_roc_points_carry_the_table_tpr(big) -> None:
    y, pu, pf, gain = big
    counts = np.random.default_rng(5).integers(1, 1000, len(y)).astype(float)
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], counts=counts, seeds=2)
    # reference: sklearn.metrics.roc_curve with sample_weight
    fpr, tpr, _ = roc_curve(y == 1, pu[:, 1], sample_weight=counts, drop_intermediate=False)
    row = next(r for r in rep["per_class"] if r["category"] == "b")
    assert row["tpr_at_fpr_0.001_url"] == pytest.approx(tpr[fpr <= 1e-3].max(), abs=1e-4)


def test_dollar_signs_in_category_names_render(data, tmp_path) -> None:
    y, pu, pf, gain = data
    names = ["$x^$", "price $\\frac$", "a$b$c", "<b>&"]
    paths = write_report(build_report(y, pu, pf, gain, names, seeds=1), tmp_path / "d")
    page = paths["html"].read_text()
    assert "&lt;b&gt;&amp;" in page and "<b>&" not in page


def test_writing_a_report_leaves_matplotlib_global_state_alone(data, tmp_path) -> None:
    import matplotlib

    y, pu, pf, gain = data
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=1)
    original = matplotlib.get_backend()
    try:
        # A caller with its own settings: a non-Agg backend and a style the report does not use.
        matplotlib.use("svg", force=True)
        with matplotlib.rc_context({"font.size": 13.0, "axes.spines.top": True}):
            before = dict(matplotlib.rcParams.copy())
            write_report(rep, tmp_path / "r")
            assert matplotlib.get_backend() == "svg"
            after = dict(matplotlib.rcParams.copy())
            assert after.keys() == before.keys()
            assert [key for key in before if after[key] != before[key]] == []
    finally:
        matplotlib.use(original, force=True)


def test_tpr_at_a_tiny_fpr_is_not_printed_where_the_negatives_cannot_measure_it(data) -> None:
    y, pu, pf, gain = data  # 800 rows: about 600 negatives per class, under 1,000
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=1,
                       costs=[1.0, 2.0, 1.0, 5.0])
    for row in rep["per_class"]:
        assert row["tpr_at_fpr_0.001_url"] is None and not row["tpr_measurable"]
    assert rep["unit_costs"] is False
    html_page = _html(rep, [])
    assert "not measurable" in html_page and "cost-weighted" in html_page


def test_budget_rows_come_in_operational_units_with_the_knee_marked(data) -> None:
    from cascade.budget import FetchCosts

    y, pu, pf, gain = data
    costs = FetchCosts.from_history([{"domain": "a.example", "ok": False, "bytes": 1000.0,
                                      "ms": 2000.0}] * 20)
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=1, fetch_costs=costs,
                       domains=["a.example"] * len(y), concurrency=4)
    row = next(r for r in rep["budget_table"] if r["budget"] == 0.5)
    ops = row["operations"]
    assert ops["fetches"] == 400
    # 20 failed fetches of 1,000 bytes and 2 s, shrunk toward the defaults by 5 pseudo-fetches
    fail, nbytes, secs = costs.estimate("a.example")
    assert ops["bytes"] == round(400 * nbytes) and ops["wall_seconds"] == round(
        400 * secs / 4, 1)
    assert ops["expected_failures"] == pytest.approx(400 * fail, abs=0.1)
    lo, hi = row["planner"]["accuracy_95"]
    assert lo <= row["planner"]["accuracy"] <= hi
    assert 0 < rep["knee_budget"] < 1 and rep["fetch_costs"]["from_history"]
    assert 0 < rep["suggested_fetch_below"] < 1
    assert set(rep["coverage_at_precision"]) == {"url_only", "planner_at_operating_budget",
                                                  "fetch_all"}
    for name, cov in rep["coverage_at_precision"].items():  # every headline has its spread
        lo, hi = cov["coverage_95"]
        assert 0.0 <= lo <= hi <= 1.0
        lo, hi = rep["ece_15_95"][name]
        assert 0.0 <= lo <= hi <= 1.0


def test_risk_levels_reach_the_per_category_rows_and_the_breakdown(data) -> None:
    y, pu, pf, gain = data
    risk = {"a": "high", "b": "low", "c": "low", "d": "high"}
    rep = build_report(y, pu, pf, gain, ["a", "b", "c", "d"], seeds=1, risk=risk)
    assert [r["risk"] for r in rep["per_class"]] == ["high", "low", "low", "high"]
    assert rep["by_risk"]["cascade"]["high_risk_categories"] == ["a", "d"]
    assert "under-blocking" in _html(rep, [])
