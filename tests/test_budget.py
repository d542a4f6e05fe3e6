"""Budget, fetch-value model and planner: the plan never overruns a limit, ranks by expected
gain per unit of cost, weights by lookups, and the fetch-value model's files are safe."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cascade.budget import Budget, FetchCosts, plan
from cascade.errors import ModelFileError, NotFittedError
from cascade.fetch_value import (
    OUTCOMES,
    DomainHistory,
    FetchValueModel,
    confidence_gain,
    fetch_outcomes,
)


def _synthetic(n: int, k: int = 4, seed: int = 0):
    """URL probabilities whose confidence tracks correctness, and a page that fixes most
    wrong verdicts: the shape of the real data, invented here."""
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    logit = rng.normal(0, 1, (n, k))
    logit[np.arange(n), y] += rng.normal(2.0, 2.0, n)
    pu = np.exp(logit)
    pu /= pu.sum(1, keepdims=True)
    lp = rng.normal(0, 1, (n, k))
    lp[np.arange(n), y] += 3.0
    pf = np.exp(lp + np.log(pu))
    pf /= pf.sum(1, keepdims=True)
    return y, pu, pf


@pytest.fixture(scope="module")
def fitted():
    y, pu, pf = _synthetic(3000)
    return FetchValueModel().fit(pu, pf, y, costs=np.array([1.0, 1.0, 1.0, 4.0]))


def test_budget_parse_forms() -> None:
    assert Budget.parse("500") == Budget(max_fetches=500)
    assert Budget.parse("12.5%") == Budget(max_fraction=0.125)
    assert Budget.parse(None, "2MiB").max_bytes == 2 * 1024 * 1024
    assert Budget.parse(None, "50MB").max_bytes == 50_000_000
    assert Budget.parse(None, None, "90").max_seconds == 90.0
    for bad in ("ten", "-3"):
        with pytest.raises(ValueError):
            Budget.parse(bad)
    with pytest.raises(ValueError, match="size"):
        Budget.parse(None, "lots")
    with pytest.raises(ValueError):
        Budget(max_fraction=1.5)


def test_count_limit_takes_the_tighter_limit_and_rounds_down() -> None:
    assert Budget(max_fraction=0.1).count_limit(95) == 9
    assert Budget(max_fetches=3, max_fraction=0.5).count_limit(100) == 3
    assert Budget().count_limit(7) == 7
    assert Budget(max_fraction=0.0).count_limit(1000) == 0


def test_fetch_outcomes_match_their_definition() -> None:
    y = np.array([0, 0, 1, 1])
    pu = np.array([[0.9, 0.1], [0.8, 0.2], [0.7, 0.3], [0.6, 0.4]])
    pf = np.array([[0.9, 0.1], [0.2, 0.8], [0.3, 0.7], [0.6, 0.4]])
    assert [OUTCOMES[i] for i in fetch_outcomes(y, pu, pf)] == [
        "kept-right", "broke", "fixed", "kept-wrong"]


def test_fetch_value_model_ranks_better_than_chance(fitted) -> None:
    y, pu, pf = _synthetic(2000, seed=1)
    gain = fitted.expected_gain(pu)["gain"]
    fixes = fetch_outcomes(y, pu, pf) == 2
    top = np.argsort(-gain)[:200]
    # The 10% it ranks first hold several times the base rate of fixable verdicts.
    assert fixes[top].mean() > 2 * fixes.mean()
    est = fitted.expected_gain(pu)
    assert np.all((est["p_wrong"] >= 0) & (est["p_wrong"] <= 1))
    assert np.all((est["p_fix"] >= 0) & (est["p_fix"] <= 1))


def test_costly_category_raises_the_gain(fitted) -> None:
    # Same confidence, but the runner-up is the category that costs four times as much.
    a = np.array([[0.5, 0.3, 0.1, 0.1]])
    b = np.array([[0.5, 0.1, 0.1, 0.3]])
    assert fitted.expected_gain(b)["gain"][0] > fitted.expected_gain(a)["gain"][0]


def test_fetch_value_model_save_load_round_trip_and_refuses_tampering(fitted, tmp_path) -> None:
    path = fitted.save(tmp_path / "cost", links={"bundle": "v1"})
    loaded = FetchValueModel.load(path)
    assert loaded.links_ == {"bundle": "v1"}
    _, pu, _ = _synthetic(50, seed=3)
    np.testing.assert_allclose(loaded.expected_gain(pu)["gain"],
                               fitted.expected_gain(pu)["gain"])
    meta = json.loads((path / "model.json").read_text())
    meta["params"]["C"] = 99.0
    (path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelFileError, match="digest"):
        FetchValueModel.load(path)
    with pytest.raises(ModelFileError):
        from cascade.fuse import Fusion
        Fusion.load(fitted.save(tmp_path / "cost2"))  # a fetch-value model is not a fusion


def test_unfitted_and_bad_inputs_raise_clear_errors() -> None:
    with pytest.raises(NotFittedError):
        FetchValueModel().expected_gain(np.full((1, 3), 1 / 3))
    with pytest.raises(ValueError, match="at least 10"):
        FetchValueModel().fit(np.full((3, 2), 0.5), np.full((3, 2), 0.5), np.array([0, 1, 0]))


def test_plan_orders_by_gain_and_gives_reasons(fitted) -> None:
    _, pu, _ = _synthetic(100, seed=4)
    urls = [f"http://u{i}.example/" for i in range(100)]
    result = plan(urls, pu, fitted, Budget(max_fraction=0.1))
    gains = [i.gain for i in result.fetch]
    assert len(gains) == 10 and gains == sorted(gains, reverse=True)
    assert {i.reason for i in result.skipped} <= {"budget:count", "no-gain"}
    assert result.totals["fetches"] == 10
    assert min(gains) >= max(i.gain for i in result.skipped if i.reason == "budget:count")


def test_lookup_volume_moves_a_url_up(fitted) -> None:
    pu = np.tile([[0.4, 0.3, 0.2, 0.1]], (3, 1))
    pu[0] = [0.34, 0.33, 0.23, 0.1]  # the least confident: first when all counts are 1
    urls = ["http://a.example/", "http://b.example/", "http://c.example/"]
    assert plan(urls, pu, fitted, Budget(max_fetches=1)).fetch[0].url == urls[0]
    weighted = plan(urls, pu, fitted, Budget(max_fetches=1), counts=[1, 10_000, 1])
    assert weighted.fetch[0].url == urls[1]


def test_no_gain_urls_are_never_fetched(fitted) -> None:
    pu = np.tile([[0.25, 0.25, 0.25, 0.25]], (2, 1))
    result = plan(["http://a.example/", "http://b.example/"], pu, fitted, Budget(),
                  counts=[0, 1])
    assert [i.reason for i in result.items] == ["no-gain", "selected"]


@settings(max_examples=40, deadline=None)
@given(n=st.integers(0, 60), count=st.integers(0, 70), max_bytes=st.integers(0, 400_000),
       max_seconds=st.floats(0, 20), seed=st.integers(0, 2**16))
def test_plan_never_exceeds_any_limit(fitted, n, count, max_bytes, max_seconds, seed) -> None:
    rng = np.random.default_rng(seed)
    pu = rng.dirichlet(np.ones(4), size=n) if n else np.zeros((0, 4))
    domains = [f"d{rng.integers(0, 5)}.example" for _ in range(n)]
    history = FetchCosts.from_history(
        [{"domain": d, "ok": bool(rng.random() < 0.8), "bytes": float(rng.integers(1, 2e5)),
          "ms": float(rng.integers(1, 5000))} for d in domains])
    budget = Budget(max_fetches=count, max_bytes=max_bytes, max_seconds=max_seconds)
    result = plan([f"http://{d}/{i}" for i, d in enumerate(domains)], pu, fitted, budget,
                  domains=domains, fetch_costs=history)
    chosen = result.fetch
    assert len(chosen) <= min(count, n)
    assert sum(i.expected_bytes for i in chosen) <= max_bytes
    assert sum(i.expected_seconds for i in chosen) <= max_seconds + 1e-9
    assert [i.rank for i in chosen] == list(range(1, len(chosen) + 1))
    assert len(result.items) == n


def test_fetch_costs_shrink_towards_suffix_and_global() -> None:
    rows = [{"domain": "flaky.example", "ok": False, "bytes": 0, "ms": 10_000}] * 20
    rows += [{"domain": f"ok{i}.example", "ok": True, "bytes": 50_000, "ms": 200}
             for i in range(20)]
    rows += [{"domain": "once.test", "ok": False, "bytes": 0, "ms": 100}]
    costs = FetchCosts.from_history(rows, prior_weight=5.0)
    fail, _, secs = costs.estimate("flaky.example")
    assert fail > 0.8 and secs > 5.0
    # One failure does not condemn a domain: shrunk towards the (small) suffix figure.
    assert costs.estimate("once.test")[0] < 0.8
    # Unknown domain under a known suffix takes the suffix's figures.
    assert costs.estimate("new.example")[0] == pytest.approx(costs.estimate("x.example")[0])
    # No history at all: the defaults.
    assert FetchCosts().estimate("any.example") == (0.0, 60_000.0, 0.5)


def test_failing_domain_is_planned_after_a_healthy_one(fitted) -> None:
    rows = [{"domain": "down.example", "ok": False, "bytes": 0, "ms": 10_000}] * 50
    costs = FetchCosts.from_history(rows)
    pu = np.tile([[0.4, 0.3, 0.2, 0.1]], (2, 1))
    result = plan(["http://down.example/", "http://up.test/"], pu, fitted, Budget(max_fetches=1),
                  domains=["down.example", "up.test"], fetch_costs=costs)
    assert result.fetch[0].url == "http://up.test/"


def test_domain_history_features_leave_the_row_out() -> None:
    h = DomainHistory.from_rows(["a.example"] * 3 + ["b.example"], [1, 1, 2, 0])
    assert h.features("a.example", 1) == pytest.approx((np.log1p(3), 2 / 3))
    assert h.features("a.example", 1, leave_out=1) == pytest.approx((np.log1p(2), 0.5))
    assert h.features("c.example", 0) == (0.0, 0.0)


def test_plan_without_cost_model_falls_back_to_confidence() -> None:
    pu = np.array([[0.9, 0.1], [0.55, 0.45], [0.7, 0.3]])
    result = plan(["http://a.example/", "http://b.example/", "http://c.example/"], pu, None,
                  Budget(max_fetches=2))
    assert [i.url for i in result.fetch] == ["http://b.example/", "http://c.example/"]
    np.testing.assert_allclose(confidence_gain(pu, np.ones(2))["p_wrong"], [0.1, 0.45, 0.3])


def test_fetch_history_with_negative_or_nan_figures_is_refused() -> None:
    for bad in ({"domain": "a.example", "ok": True, "bytes": -5, "ms": 1},
                {"domain": "a.example", "ok": True, "bytes": float("nan"), "ms": 1}):
        with pytest.raises(ValueError, match="finite"):
            FetchCosts.from_history([bad])


def test_failed_refit_keeps_the_fitted_state(fitted) -> None:
    y, pu, pf = _synthetic(200, seed=9)
    before = fitted.costs_.copy()
    for costs in ([1.0, 1.0, 1.0, 0.0], [1.0, float("nan"), 1.0, 1.0], [1.0, 1.0]):
        with pytest.raises(ValueError, match="costs"):
            fitted.fit(pu, pf, y, costs=np.array(costs))
    np.testing.assert_array_equal(fitted.costs_, before)


def test_fetch_value_model_file_with_wrong_shapes_is_refused(fitted, tmp_path) -> None:
    from cascade.models.model_files import load_model_dir, save_model_dir

    path = fitted.save(tmp_path / "cost")
    meta, arrays = load_model_dir(path, "fetch-value-model")
    arrays["scale"] = arrays["scale"][:-1]  # consistently re-hashed, but the wrong shape
    body = {k: v for k, v in meta.items()
            if k not in ("format", "format_version", "kind", "files", "content_sha256")}
    save_model_dir(tmp_path / "bad", "fetch-value-model", body, arrays)
    with pytest.raises(ModelFileError, match="shape"):
        FetchValueModel.load(tmp_path / "bad")


def test_fallback_plan_weighs_category_costs() -> None:
    # Equal confidence; the second URL's runner-up is the costly category.
    pu = np.array([[0.6, 0.4, 0.0], [0.6, 0.0, 0.4]])
    result = plan(["http://a.example/", "http://b.example/"], pu, None, Budget(max_fetches=1),
                  costs=np.array([1.0, 1.0, 5.0]))
    assert result.fetch[0].url == "http://b.example/"
