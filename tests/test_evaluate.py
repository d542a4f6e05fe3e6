"""Evaluation splits: by time, by domain, never one URL on both sides."""

from __future__ import annotations

import numpy as np
import pytest

from cascade.evaluate import evaluate_proba, evaluation_split


@pytest.fixture(scope="module")
def log(scenario):
    """The session scenario's records (first-sighting order) and their keys."""
    return scenario.records, scenario.keys


def test_time_split_trains_before_the_cut_and_tests_new_domains(log) -> None:
    records, keys = log
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25)
    assert split.method == "time+domain"
    train_domains = {keys[i].registered_domain for i in split.train}
    test_domains = {keys[i].registered_domain for i in split.test}
    assert not train_domains & test_domains
    first_test = min(records[i].seen_at for i in split.test)
    assert first_test >= split.cut


def test_plain_time_split_has_no_url_on_both_sides(log) -> None:
    records, keys = log
    doubled = keys + keys[:50]
    times = [r.seen_at for r in records] + ["2099-01-01T00:00:00Z"] * 50
    split = evaluation_split(doubled, times, test_fraction=0.2, group_by_domain=False)
    train_urls = {doubled[i].url for i in split.train}
    assert not any(doubled[i].url in train_urls for i in split.test)
    assert split.dropped >= 50


def test_domain_hash_split_without_times_is_deterministic(log) -> None:
    _, keys = log
    a = evaluation_split(keys, None, test_fraction=0.2, seed=7)
    b = evaluation_split(keys, None, test_fraction=0.2, seed=7)
    assert a.method == "domain-hash"
    assert np.array_equal(a.test, b.test)
    share = len(a.test) / len(keys)
    assert 0.05 < share < 0.4


def test_evaluate_proba_refuses_unknown_labels() -> None:
    with pytest.raises(ValueError, match="not among"):
        evaluate_proba(np.array([[1.0, 0.0]]), ["c"], ["a", "b"])


def test_risk_breakdown_counts_both_ways_of_crossing_the_risk_line() -> None:
    from cascade.evaluate import risk_breakdown

    # a worked example counted by hand: classes a (high risk), b and c (low)
    classes = ["a", "b", "c"]
    y = np.array([0, 0, 0, 1, 1, 2, 2, 2])
    pred = np.array([0, 1, 2, 1, 0, 2, 0, 1])
    out = risk_breakdown(y, pred, classes, {"a": "high", "b": "low", "c": "low"})
    assert out["high_risk_categories"] == ["a"]
    assert out["under_blocking"]["rows"] == 2  # two 'a' rows put in b or c
    assert out["under_blocking"]["share_of_high_risk_rows"] == pytest.approx(2 / 3)
    assert out["over_blocking"]["rows"] == 2  # one b and one c row put in a
    assert out["over_blocking"]["share_of_low_risk_rows"] == pytest.approx(2 / 5)
    assert out["levels"]["high"] == {"rows": 3, "accuracy": pytest.approx(1 / 3)}


def test_per_class_change_flags_the_categories_that_got_worse() -> None:
    from cascade.evaluate import per_class_change

    before = {"per_class": {"a": {"f1": 0.80}, "b": {"f1": 0.50}, "c": {"f1": None}}}
    after = {"per_class": {"a": {"f1": 0.70}, "b": {"f1": 0.51}, "c": {"f1": 0.3}}}
    change = per_class_change(before, after)
    assert change["worse"] == ["a"]
    assert change["per_class"]["a"]["change"] == pytest.approx(-0.10)
    assert change["per_class"]["c"]["change"] is None


def test_evaluate_with_pages_reports_the_fused_verdict(cli_pages_dir, tmp_path) -> None:
    import json

    from cascade.cli import EXIT_OK, main

    out = tmp_path / "m.json"
    code = main(["--quiet", "evaluate", "-m", str(cli_pages_dir / "model"), "-i",
                 str(cli_pages_dir / "train.csv"), "--pages", str(cli_pages_dir / "saved"),
                 "-o", str(out)])
    assert code == EXIT_OK
    m = json.loads(out.read_text())
    assert set(m) >= {"url_model", "fused", "fusion_change"}
    assert m["fused"]["rows_with_a_page"] > 0 and "by_risk" in m["fused"]
    assert set(m["fusion_change"]["per_class"]) == set(m["url_model"]["per_class"])
