"""The model bundle: trained stacked, saved with links between its parts, and the one
prediction pipeline: each verdict's stage and reason follow the table in
docs/architecture.md (cascade/verdict.py), from hand-made fetch results."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from cascade.budget import Budget, plan
from cascade.bundle import FETCH_VALUE_DIR, ModelBundle, fit_bundle
from cascade.errors import ModelFileError
from cascade.extract import extract
from cascade.fetch import FetchOutcome, FetchResult
from cascade.models.page_model import PageModel
from cascade.models.url_model import UrlModel
from cascade.scenario.pages import render_page
from cascade.verdict import Reason, Stage

THIN_HTML = "<html><head><title>hi</title></head><body><p>there</p></body></html>"


def _ok(url: str, html: str) -> FetchResult:
    return FetchResult(url=url, final_url=url, outcome=FetchOutcome.OK, status=200,
                       content_type="text/html", charset="utf-8", text=html,
                       bytes_read=len(html.encode()))


def _failed(url: str, outcome: FetchOutcome) -> FetchResult:
    return FetchResult(url=url, final_url=url, outcome=outcome, detail="made by hand")


@pytest.fixture(scope="module")
def unseen(bundle, scenario):
    """Three scenario rows the bundle never saw: (normalized URL, page HTML)."""
    start = bundle.report["rows"]
    rows = scenario.records[start:start + 3]
    return [(scenario.keys[start + i].url, render_page(r.url, r.label, r.page_seed))
            for i, r in enumerate(rows)]


def _proba(bundle, top: float) -> np.ndarray:
    """One probability row over the bundle's classes whose best class has ``top``."""
    k = len(bundle.classes)
    row = np.full(k, (1.0 - top) / (k - 1))
    row[2] = top
    return row[None, :]


# ---------------------------------------------------------------------------- training, files
def test_bundle_trains_saves_and_checks_links(bundle, scenario, tmp_path):
    assert bundle.page_model is not None and bundle.fusion is not None
    assert bundle.held_out["url_proba"].shape[0] == bundle.report["stacked_rows"]
    own = copy.deepcopy(bundle)  # saving sets the versions: keep the shared bundle's own
    path = own.save(tmp_path / "bundle")
    loaded = ModelBundle.load(path)
    assert loaded.version == own.version
    # a page model from another training is refused beside this fusion
    other = PageModel(n_features=2**16, max_iter=5).fit(scenario.pages[:60],
                                                        scenario.labels[:60],
                                                        taxonomy=bundle.url_model.taxonomy_)
    other.save(path / "page")
    with pytest.raises(ModelFileError, match="retrain"):
        ModelBundle.load(path)


def test_bundle_with_every_page_on_one_domain_trains_without_a_fetch_value_model() -> None:
    urls = [f"http://site{i}.example/p" for i in range(90)] + \
        [f"http://one.example/p{i}" for i in range(30)]
    labels = (["news", "games", "travel"] * 40)
    pages = [None] * 90 + [extract(f"<title>{labels[90 + i]} page</title><p>{labels[90 + i]} "
                                   "words here and more words</p>") for i in range(30)]
    bundle = fit_bundle(urls, labels, pages, folds=3,
                        url_model=UrlModel(n_features=2**12, max_iter=20),
                        page_model=PageModel(n_features=2**12, max_iter=20))
    assert bundle.value_model is None
    assert "not fitted" in str(bundle.report.get("fetch_value_model", "not fitted"))


def test_directory_with_an_old_cost_model_is_refused_naming_the_format(bundle, tmp_path):
    own = copy.deepcopy(bundle)
    assert own.value_model is not None
    path = own.save(tmp_path / "bundle")
    (path / FETCH_VALUE_DIR).rename(path / "cost")  # as cascade 0.1 laid it out
    with pytest.raises(ModelFileError, match=r"model format 1, directory 'cost/'"):
        ModelBundle.load(path)


# ---------------------------------------------------------------------------- probabilities
def test_predict_proba_is_the_url_models_where_there_is_no_page(bundle, unseen):
    urls = [u for u, _ in unseen] + [unseen[0][0]]
    pages = [None, unseen[1][1], None, unseen[0][1]]
    fused = bundle.predict_proba(urls, pages)
    url_rows = bundle.url_model.predict_proba(urls)
    np.testing.assert_array_equal(fused[[0, 2]], url_rows[[0, 2]])
    assert not np.allclose(fused[[1, 3]], url_rows[[1, 3]])
    np.testing.assert_allclose(fused.sum(axis=1), 1.0)


def test_predict_proba_without_pages_is_the_url_models(bundle, unseen):
    urls = [u for u, _ in unseen]
    np.testing.assert_array_equal(bundle.predict_proba(urls),
                                  bundle.url_model.predict_proba(urls))


# ---------------------------------------------------------------------------- verdicts
def test_confident_url_keeps_the_url_stage_and_needs_no_fetch(bundle, unseen):
    url = unseen[0][0]
    (v,) = bundle.verdicts([url], url_proba=_proba(bundle, 0.9), fetch_below=0.8)
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.URL, Reason.CONFIDENT, False)
    assert v.category == bundle.classes[2] and v.confidence == pytest.approx(0.9)
    assert v.model_version == bundle.version


def test_unsure_url_without_a_plan_is_under_threshold_and_needs_a_fetch(bundle, unseen):
    (v,) = bundle.verdicts([unseen[0][0]], url_proba=_proba(bundle, 0.5), fetch_below=0.8)
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.URL, Reason.UNDER_THRESHOLD, True)


@pytest.mark.parametrize("reason", [Reason.BUDGET_COUNT, Reason.BUDGET_BYTES,
                                    Reason.BUDGET_SECONDS, Reason.NO_GAIN])
def test_unsure_url_left_out_of_the_plan_keeps_the_plans_reason(bundle, unseen, reason):
    url = unseen[0][0]
    (v,) = bundle.verdicts([url], url_proba=_proba(bundle, 0.5), plan={url: str(reason)})
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.URL, reason, True)


def test_planned_url_with_no_fetch_result_is_page_none(bundle, unseen):
    url = unseen[0][0]
    (v,) = bundle.verdicts([url], url_proba=_proba(bundle, 0.5),
                           plan={url: str(Reason.SELECTED)})
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.URL, Reason.PAGE_NONE, True)


def test_a_plan_object_gives_each_url_its_reason(bundle, unseen):
    urls = [u for u, _ in unseen[:2]]
    pu = np.vstack([_proba(bundle, 0.4), _proba(bundle, 0.6)])
    chosen = plan(urls, pu, None, Budget(max_fetches=1))  # lowest confidence first
    verdicts = bundle.verdicts(urls, url_proba=pu, plan=chosen)
    assert [v.reason for v in verdicts] == [Reason.PAGE_NONE, Reason.BUDGET_COUNT]


def test_fetched_page_is_fused_at_the_page_stage(bundle, unseen):
    url, html = unseen[1]
    (v,) = bundle.verdicts([url], fetches=[_ok(url, html)])
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.PAGE, Reason.FUSED, False)
    fused = bundle.predict_proba([url], [extract(html, url=url)])[0]
    assert v.confidence == pytest.approx(fused.max())
    assert v.category == bundle.classes[int(fused.argmax())]


def test_fetches_keyed_by_normalized_url_are_found(bundle, unseen):
    url, html = unseen[1]
    typed = url.replace("http://", "HTTP://", 1)  # RFC 3986 section 6.2.2.1: case-insensitive
    (v,) = bundle.verdicts([typed], fetches={url: _ok(url, html)})
    assert v.url == url and v.reason == Reason.FUSED


def test_thin_page_keeps_the_url_verdict(bundle, unseen):
    url = unseen[1][0]
    assert bundle.fusion.min_page_words > 2  # THIN_HTML has two words
    (v,) = bundle.verdicts([url], fetches=[_ok(url, THIN_HTML)])
    assert (v.stage, v.reason) == (Stage.URL, Reason.PAGE_THIN)
    assert v.confidence == pytest.approx(bundle.url_model.predict_proba([url])[0].max())


@pytest.mark.parametrize("outcome", [o for o in FetchOutcome if o is not FetchOutcome.OK],
                         ids=str)
def test_failed_fetch_keeps_the_url_verdict_with_its_outcome(bundle, unseen, outcome):
    url = unseen[2][0]
    (v,) = bundle.verdicts([url], fetches=[_failed(url, outcome)])
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.URL, f"fetch:{outcome.value}", False)
    assert v.confidence == pytest.approx(bundle.url_model.predict_proba([url])[0].max())


def test_url_only_bundle_given_a_page_says_no_page_model(bundle, unseen):
    url, html = unseen[1]
    url_only = ModelBundle(bundle.url_model)
    (v,) = url_only.verdicts([url], fetches=[_ok(url, html)])
    assert (v.stage, v.reason) == (Stage.URL, Reason.NO_PAGE_MODEL)
