"""Page model, fusion and the trained bundle, on small invented pages (the demo scenario)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.metrics import accuracy_score

from cascade.bundle import ModelBundle, fit_bundle
from cascade.errors import ModelFileError, NotFittedError
from cascade.extract import extract
from cascade.fuse import Fusion
from cascade.models.page_model import PageModel
from cascade.models.url_model import UrlModel
from cascade.scenario import generate_telemetry
from cascade.scenario.pages import render_page


@pytest.fixture(scope="module")
def scenario():
    records = generate_telemetry(seed=3, n_sites=160)
    pages = [extract(render_page(r.url, r.label, r.page_seed), url=r.url) for r in records]
    return records, pages


@pytest.fixture(scope="module")
def page_model(scenario):
    records, pages = scenario
    half = len(records) // 2
    model = PageModel(n_features=2**18, max_iter=60).fit(
        pages[:half], [r.label for r in records[:half]])
    return model, half


def test_page_model_learns_invented_pages(page_model, scenario):
    records, pages = scenario
    model, half = page_model
    pred = model.predict(pages[half:])
    # reference metric implementation: sklearn.metrics.accuracy_score
    acc = accuracy_score([r.label for r in records[half:]], pred)
    assert acc > 0.6
    proba = model.predict_proba(pages[half:])
    assert np.allclose(proba.sum(axis=1), 1.0)


def test_title_word_is_another_feature_than_body_word(page_model):
    model, _ = page_model
    a = extract("<html><head><title>harbour</title></head><body><p>x</p></body></html>")
    b = extract("<html><head><title>x</title></head><body><p>harbour</p></body></html>")
    xa, xb = model.transform([a]), model.transform([b])
    assert set(xa.indices) != set(xb.indices)


def test_page_model_round_trips_and_refuses_tampering(page_model, scenario, tmp_path):
    _, pages = scenario
    model, _ = page_model
    path = model.save(tmp_path / "page")
    again = PageModel.load(path)
    assert np.allclose(again.predict_proba(pages[:20]), model.predict_proba(pages[:20]))
    meta = json.loads((path / "model.json").read_text())
    meta["calibration"]["temperature"] = 0.5
    (path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelFileError):
        PageModel.load(path)


def test_explain_is_exact_and_names_page_words(page_model, scenario):
    _, pages = scenario
    model, _ = page_model
    exp = model.explain(pages[0], top=5, n_classes=1)
    cls = exp.classes[0]
    total = cls.bias + sum(c.value for c in cls.contributions) + exp.rest[0]
    assert total == pytest.approx(cls.logit, abs=1e-4)
    assert all(":" in c.feature for c in cls.contributions)


def test_unfitted_page_model_raises_typed_error():
    with pytest.raises(NotFittedError):
        PageModel().predict_proba(["<p>hello</p>"])


def test_fusion_falls_back_with_reason():
    rng = np.random.default_rng(0)
    k = 4
    y = rng.integers(0, k, 400)
    pu = np.full((400, k), 0.1)
    pu[np.arange(400), y] = 0.7
    pp = rng.dirichlet(np.ones(k), 400)
    fusion = Fusion().fit(pu, pp, y, np.full(400, 100))
    row = fusion.combine(pu[0], pp[0], page_words=3)
    assert (row.stage, row.reason) == ("url", "page:thin")
    assert fusion.combine(pu[0], None, fetch_outcome="timeout").reason == "fetch:timeout"
    fused = fusion.combine(pu[0], pp[0], page_words=200)
    assert fused.stage == "page" and fused.proba.sum() == pytest.approx(1.0)


def test_fusion_learns_to_ignore_a_useless_page():
    # the URL model is right 70% of the time, the page is noise: fusion must not be worse
    rng = np.random.default_rng(1)
    k, n = 5, 3000
    y = rng.integers(0, k, n)
    guess = np.where(rng.random(n) < 0.7, y, rng.integers(0, k, n))
    pu = np.full((n, k), 0.3 / (k - 1))
    pu[np.arange(n), guess] = 0.7
    pp = rng.dirichlet(np.ones(k) * 0.3, n)
    fusion = Fusion().fit(pu[:2000], pp[:2000], y[:2000], np.full(2000, 100))
    fused = fusion.predict_proba(pu[2000:], pp[2000:], np.full(1000, 100))
    assert (fused.argmax(1) == y[2000:]).mean() >= (pu[2000:].argmax(1) == y[2000:]).mean() - 0.01


def test_bundle_trains_saves_and_checks_links(scenario, tmp_path):
    records, pages = scenario
    rows = records[:500]
    bundle = fit_bundle([r.url for r in rows], [r.label for r in rows], pages[:500],
                        url_model=UrlModel(n_features=2**16, max_iter=40),
                        page_model=PageModel(n_features=2**16, max_iter=40), folds=3)
    assert bundle.page_model is not None and bundle.fusion is not None
    assert bundle.held_out["url_proba"].shape[0] == bundle.report["stacked_rows"]
    path = bundle.save(tmp_path / "bundle")
    loaded = ModelBundle.load(path)
    assert loaded.version == bundle.version
    # a page model from another training is refused beside this fusion
    other = PageModel(n_features=2**16, max_iter=5).fit(pages[:60], [r.label for r in
                                                                     records[:60]],
                                                        taxonomy=bundle.url_model.taxonomy_)
    other.save(path / "page")
    with pytest.raises(ModelFileError, match="retrain"):
        ModelBundle.load(path)


def test_bundle_with_every_page_on_one_domain_trains_without_a_fetch_value_model() -> None:
    from cascade.bundle import fit_bundle
    from cascade.extract import extract as _extract

    urls = [f"http://site{i}.example/p" for i in range(90)] + \
        [f"http://one.example/p{i}" for i in range(30)]
    labels = (["news", "games", "travel"] * 40)
    pages = [None] * 90 + [_extract(f"<title>{labels[90 + i]} page</title><p>{labels[90 + i]} "
                                    "words here and more words</p>") for i in range(30)]
    bundle = fit_bundle(urls, labels, pages, folds=3,
                        url_model=UrlModel(n_features=2**12, max_iter=20),
                        page_model=PageModel(n_features=2**12, max_iter=20))
    assert bundle.value_model is None
    assert "not fitted" in str(bundle.report.get("fetch_value_model", "not fitted"))
