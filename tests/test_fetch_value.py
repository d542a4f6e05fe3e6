"""The fetch-value model's features and files: out-of-fold category rates never see a row's
own outcome, URL shape reads the standards it names, old files are refused, and a category
the page overturns far more often is fetched first."""

from __future__ import annotations

import json

import numpy as np
import pytest

from cascade.budget import Budget, plan
from cascade.errors import ModelFileError
from cascade.fetch_value import (
    CLASS_RATES,
    URL_SHAPE_FEATURES,
    VALUE_FORMAT,
    DomainHistory,
    FetchValueModel,
    class_rate_events,
    fetch_outcomes,
    oof_class_rates,
    url_shape_features,
)
from cascade.models.model_files import load_model_dir, save_model_dir
from cascade.urls import UrlKey, normalize


def _overturned_class(n: int, seed: int, hot: int = 2, k: int = 4):
    """URL verdicts equally (un)sure in every category, calibrated; the page fixes 85% of
    the wrong verdicts in category ``hot`` and 10% elsewhere. Invented data."""
    rng = np.random.default_rng(seed)
    pred = rng.integers(0, k, n)
    top = rng.uniform(0.4, 0.7, n)
    pu = np.repeat(((1 - top) / (k - 1))[:, None], k, axis=1)
    pu[np.arange(n), pred] = top
    right = rng.random(n) < top
    y = np.where(right, pred, (pred + rng.integers(1, k, n)) % k)
    fixes = ~right & (rng.random(n) < np.where(pred == hot, 0.85, 0.10))
    fused_class = np.where(right | fixes, y, pred)
    pf = np.full((n, k), 0.1 / (k - 1))
    pf[np.arange(n), fused_class] = 0.9
    return y, pu, pf


def _shape(url: str | UrlKey) -> dict[str, float]:
    return dict(zip(URL_SHAPE_FEATURES, url_shape_features([url])[0], strict=True))


@pytest.fixture(scope="module")
def hot_model() -> FetchValueModel:
    y, pu, pf = _overturned_class(3000, seed=0)
    return FetchValueModel().fit(pu, pf, y)


# --------------------------------------------------------------------- out-of-fold rates
def test_a_rows_own_outcome_never_changes_its_own_rate() -> None:
    rng = np.random.default_rng(1)
    n, k = 300, 5
    pred = rng.integers(0, k, n)
    events = (rng.random((n, 3)) < 0.3).astype(float)
    before, _ = oof_class_rates(pred, events, k, prior=5.0, folds=10, seed=3)
    for i in (0, 17, 123):
        flipped = events.copy()
        flipped[i] = 1.0 - flipped[i]
        after, _ = oof_class_rates(pred, flipped, k, prior=5.0, folds=10, seed=3)
        np.testing.assert_array_equal(after[i], before[i])  # its own feature: unchanged
        assert not np.array_equal(after, before)  # rows of other folds do see it


def test_rates_from_other_folds_carry_no_leak_where_in_sample_rates_would() -> None:
    # 200 categories of one row each: an in-sample rate is (own outcome + prior x overall)
    # / (1 + prior) and would separate fixed from unfixed rows perfectly. Out of fold, no
    # other row shares the category, so every row gets its fold's overall rate instead.
    rng = np.random.default_rng(2)
    n = 200
    pred = np.arange(n)
    fixed = (rng.random(n) < 0.5).astype(float)[:, None]
    oof, full = oof_class_rates(pred, fixed, n, prior=1.0, folds=5, seed=0)
    leaky = full[pred, 0]
    assert leaky[fixed[:, 0] == 1].min() > leaky[fixed[:, 0] == 0].max()  # what a leak does
    gap = oof[fixed[:, 0] == 1, 0].mean() - oof[fixed[:, 0] == 0, 0].mean()
    assert abs(gap) < 0.05


def test_rates_are_shrunk_towards_the_overall_rate() -> None:
    pred = np.array([0] * 90 + [1] * 10)
    events = np.array([[0.0]] * 90 + [[1.0]] * 10)  # overall 0.1; category 1 always
    _, table = oof_class_rates(pred, events, 2, prior=10.0)
    assert table[1, 0] == pytest.approx((10 + 10 * 0.1) / 20)
    assert table[0, 0] == pytest.approx((0 + 10 * 0.1) / 100)


def test_class_rate_events_follow_their_definitions() -> None:
    y = np.array([0, 0, 1, 1])
    pu = np.array([[0.9, 0.1], [0.8, 0.2], [0.7, 0.3], [0.6, 0.4]])
    pf = np.array([[0.9, 0.1], [0.2, 0.8], [0.3, 0.7], [0.6, 0.4]])
    ev = dict(zip(CLASS_RATES, class_rate_events(y, pu, pf).T, strict=True))
    assert list(ev["overturn"]) == [0, 1, 1, 0]
    assert list(ev["fixed"]) == [0, 0, 1, 0] and list(ev["broke"]) == [0, 1, 0, 0]
    assert list(ev["url-right"]) == [1, 1, 0, 0] and list(ev["fused-right"]) == [1, 0, 1, 0]
    np.testing.assert_array_equal(ev["page-right"], ev["fused-right"])  # no page_proba


# ------------------------------------------------------------------------- URL shape
def test_url_shape_of_a_user_home_page() -> None:
    f = _shape("http://www.cs.campus.example/~ann/ann.html")
    assert f["path_depth"] == 2 and f["file_tail"] == 1 and f["markup_tail"] == 1
    assert f["user_directory"] == 1 and f["below_user_directory"] == 0
    assert f["tail_repeats_directory"] == 1 and f["directory"] == 0
    assert f["subdomain_depth"] == 2 and f["query"] == 0 and f["ip_literal"] == 0


def test_percent_encoded_tilde_is_a_user_directory() -> None:
    # RFC 3986 section 2.3 / 6.2.2.2: %7E is the unreserved "~" and is decoded.
    f = _shape("http://campus.example/%7Ebo/papers/")
    assert f["user_directory"] == 1 and f["below_user_directory"] == 1
    assert f["directory"] == 1 and f["file_tail"] == 0


def test_url_shape_of_a_document_with_query_and_port() -> None:
    f = _shape("http://files.shop.test:8080/docs/manual.pdf?rev=2")
    assert f["document_tail"] == 1 and f["markup_tail"] == 0 and f["query"] == 1
    # RFC 3986 section 6.2.3: a default port is removed, so a port left is non-default.
    assert f["non_default_port"] == 1
    assert _shape("http://shop.test:80/")["non_default_port"] == 0


def test_ip_literal_hosts() -> None:
    # 192.0.2.0/24 and 2001:db8::/32 are documentation ranges (RFC 5737, RFC 3849).
    assert _shape("http://192.0.2.7/")["ip_literal"] == 1
    assert _shape("http://[2001:db8::1]/a")["ip_literal"] == 1
    # WHATWG URL Standard, IPv4 parser: a single hexadecimal number is an IPv4 address.
    assert _shape("http://0xc0000207/")["ip_literal"] == 1
    assert _shape("http://www.shop.example/")["ip_literal"] == 0


def test_host_under_a_private_public_suffix_is_hosted() -> None:
    # The Public Suffix List's PRIVATE section lists suffixes under which a provider gives
    # names to its users. The key below is what normalize() would return if the list held
    # "pages.example" there (invented: no real provider is named in tests).
    key = UrlKey("http://ann.pages.example/", "http", "ann.pages.example", "ann.pages.example",
                 None, "/", "", "ann.pages.example", "pages.example", False)
    assert _shape(key)["hosted_suffix"] == 1
    assert _shape(normalize("http://ann.shop.example/"))["hosted_suffix"] == 0


def test_url_shape_of_nothing_is_an_empty_table() -> None:
    assert url_shape_features([]).shape == (0, len(URL_SHAPE_FEATURES))


# ------------------------------------------------------------------------ the planner
def test_category_the_page_overturns_most_is_fetched_first(hot_model) -> None:
    y, pu, pf = _overturned_class(1000, seed=5)
    urls = [f"http://u{i}.example/" for i in range(len(y))]
    chosen = plan(urls, pu, hot_model, Budget(max_fraction=0.2)).order()
    assert (pu[chosen].argmax(axis=1) == 2).mean() > 0.9  # 25% of the rows overall
    # lowest-confidence-first cannot tell the categories apart here
    by_confidence = np.argsort(pu.max(axis=1), kind="stable")[:len(chosen)]
    fixes = fetch_outcomes(y, pu, pf) == 2
    assert fixes[chosen].mean() > 2 * fixes[by_confidence].mean()


def test_url_shape_model_needs_urls_and_reads_them() -> None:
    y, pu, pf = _overturned_class(400, seed=6)
    urls = [f"http://site{i % 7}.example/{'~u/' if i % 2 else 'a/b/'}p{i}.html"
            for i in range(len(y))]
    model = FetchValueModel(url_shape=True).fit(pu, pf, y, urls=urls)
    assert model.expected_gain(pu[:5], urls=urls[:5])["gain"].shape == (5,)
    with pytest.raises(ValueError, match="pass urls"):
        model.expected_gain(pu[:5])
    with pytest.raises(ValueError, match="URLs"):
        model.expected_gain(pu[:5], urls=urls[:4])


def test_domain_history_model_scores_only_known_domains() -> None:
    y, pu, pf = _overturned_class(600, seed=7)
    domains = [f"d{i % 12}.example" for i in range(len(y))]
    model = FetchValueModel().fit(pu, pf, y, domains=domains)
    assert model.domain_model_ is not None
    history = DomainHistory.from_rows(["d0.example"] * 5, [1] * 5)
    rows = pu[:2]
    with_history = model.outcome_proba(rows, ["d0.example", "new.example"], history)
    first_visit = model.outcome_proba(rows)
    np.testing.assert_allclose(with_history[1], first_visit[1])  # unknown: first visit
    assert not np.allclose(with_history[0], first_visit[0])


def test_page_right_rate_needs_page_probabilities() -> None:
    y, pu, pf = _overturned_class(100, seed=8)
    with pytest.raises(ValueError, match="page_proba"):
        FetchValueModel(class_rates=("page-right",)).fit(pu, pf, y)
    FetchValueModel(class_rates=("page-right",)).fit(pu, pf, y, page_proba=pf)
    with pytest.raises(ValueError, match="class_rates"):
        FetchValueModel(class_rates=("sometimes",)).fit(pu, pf, y)


# ----------------------------------------------------------------------------- files
def test_save_load_round_trip_with_shape_and_domain_models(tmp_path) -> None:
    y, pu, pf = _overturned_class(500, seed=9)
    urls = [f"http://s{i % 9}.example/~u{i}/" for i in range(len(y))]
    domains = [f"s{i % 9}.example" for i in range(len(y))]
    model = FetchValueModel(url_shape=True, class_onehot=True).fit(
        pu, pf, y, domains=domains, urls=urls)
    loaded = FetchValueModel.load(model.save(tmp_path / "value"))
    history = DomainHistory.from_rows(domains[:50], pf[:50].argmax(axis=1))
    for args in ((pu[:30], None, None, urls[:30]), (pu[:30], domains[:30], history, urls[:30])):
        np.testing.assert_allclose(loaded.outcome_proba(*args), model.outcome_proba(*args))
    assert loaded.get_params() == model.get_params()
    assert json.loads((tmp_path / "value" / "model.json").read_text())["value_format"] == \
        VALUE_FORMAT


def test_file_of_the_earlier_format_is_refused_naming_it(hot_model, tmp_path) -> None:
    path = hot_model.save(tmp_path / "value")
    meta, arrays = load_model_dir(path, "fetch-value-model")
    body = {k: v for k, v in meta.items()
            if k not in ("format", "format_version", "kind", "files", "content_sha256",
                         "value_format")}
    body["params"] = {"C": 1.0, "use_domains": True, "domain_dropout": 0.5, "seed": 0}
    save_model_dir(tmp_path / "old", "fetch-value-model", body, arrays)  # digests consistent
    with pytest.raises(ModelFileError, match=r"format 1.*Retrain"):
        FetchValueModel.load(tmp_path / "old")
