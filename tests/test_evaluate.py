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
