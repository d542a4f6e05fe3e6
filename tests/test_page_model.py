"""The page model on small invented pages (the demo scenario): it learns them, keeps fields
apart, explains exactly and keeps its files safe."""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest
from sklearn.metrics import accuracy_score

from cascade.errors import ModelFileError, NotFittedError
from cascade.extract import extract
from cascade.models.page_model import PageModel


@pytest.fixture(scope="module")
def page_model(bundle):
    """The shared bundle's page model, fitted on the scenario's first rows only; returns it
    and the number of those rows (the pages after them are new to it)."""
    return bundle.page_model, bundle.report["rows"]


def test_page_model_learns_invented_pages(page_model, scenario):
    model, seen = page_model
    pred = model.predict(scenario.pages[seen:])
    # reference metric implementation: sklearn.metrics.accuracy_score
    acc = accuracy_score(scenario.labels[seen:], pred)
    assert acc > 0.6
    proba = model.predict_proba(scenario.pages[seen:])
    assert np.allclose(proba.sum(axis=1), 1.0)


def test_title_word_is_another_feature_than_body_word(page_model):
    model, _ = page_model
    a = extract("<html><head><title>harbour</title></head><body><p>x</p></body></html>")
    b = extract("<html><head><title>x</title></head><body><p>harbour</p></body></html>")
    xa, xb = model.transform([a]), model.transform([b])
    assert set(xa.indices) != set(xb.indices)


def test_page_model_round_trips_and_refuses_tampering(page_model, scenario, tmp_path):
    pages = scenario.pages
    model = copy.deepcopy(page_model[0])  # saving sets the version: keep the bundle's own
    path = model.save(tmp_path / "page")
    again = PageModel.load(path)
    assert np.allclose(again.predict_proba(pages[:20]), model.predict_proba(pages[:20]))
    meta = json.loads((path / "model.json").read_text())
    meta["calibration"]["temperature"] = 0.5
    (path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelFileError):
        PageModel.load(path)


def test_explain_is_exact_and_names_page_words(page_model, scenario):
    pages = scenario.pages
    model, _ = page_model
    exp = model.explain(pages[0], top=5, n_classes=1)
    cls = exp.classes[0]
    total = cls.bias + sum(c.value for c in cls.contributions) + exp.rest[0]
    assert total == pytest.approx(cls.logit, abs=1e-4)
    assert all(":" in c.feature for c in cls.contributions)


def test_unfitted_page_model_raises_typed_error():
    with pytest.raises(NotFittedError):
        PageModel().predict_proba(["<p>hello</p>"])
