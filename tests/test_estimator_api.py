"""The estimator contract, once for each of the four fitted classes (URL model, page model,
fusion, fetch-value model): scikit-learn's rules for estimators (``__init__`` stores
parameters, ``fit`` returns self, learned state ends in ``_``, ``clone`` and
``get_params``/``set_params`` work), safe files, typed errors, exact explanations."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.exceptions import NotFittedError as SklearnNotFittedError
from sklearn.utils.validation import check_is_fitted

from cascade.errors import ModelFileError, NotFittedError
from cascade.fetch_value import FetchValueModel
from cascade.fuse import Fusion
from cascade.models.page_model import PageModel
from cascade.models.url_model import UrlModel

N_ROWS = 200


@dataclass(frozen=True)
class Data:
    """Training inputs for every class: the scenario's first rows (URL and page models) and
    the shared bundle's out-of-fold probabilities (fusion and fetch-value model)."""

    keys: list
    pages: list
    labels: list[str]
    url_proba: np.ndarray
    page_proba: np.ndarray
    fused_proba: np.ndarray
    y: np.ndarray
    words: np.ndarray


@dataclass(frozen=True)
class Case:
    name: str
    make: Callable[[], Any]  # an unfitted estimator with small settings
    fit: Callable[[Any, Data], Any]  # what fit returns
    predict: Callable[[Any, Data], np.ndarray]  # its main output on 20 rows
    prefix: str  # of ``version``
    bad_params: dict[str, Any] = field(default_factory=dict)
    other_param: tuple[str, Any] = ("max_iter", 7)


CASES = [
    Case("UrlModel", lambda: UrlModel(n_features=2**16, max_iter=10),
         lambda m, d: m.fit(d.keys, d.labels),
         lambda m, d: m.predict_proba(d.keys[:20]), "url",
         {"C": -1, "n_features": 1000}),
    Case("PageModel", lambda: PageModel(n_features=2**16, max_iter=10),
         lambda m, d: m.fit(d.pages, d.labels),
         lambda m, d: m.predict_proba(d.pages[:20]), "page",
         {"C": -1, "n_features": 1000}),
    Case("Fusion", lambda: Fusion(max_iter=50),
         lambda m, d: m.fit(d.url_proba, d.page_proba, d.y, d.words),
         lambda m, d: m.predict_proba(d.url_proba[:20], d.page_proba[:20], d.words[:20]),
         "fusion", {"alpha": -1, "max_iter": 0}),
    Case("FetchValueModel", lambda: FetchValueModel(),
         lambda m, d: m.fit(d.url_proba, d.fused_proba, d.y),
         lambda m, d: m.outcome_proba(d.url_proba[:20]), "value",
         {"C": -1, "class_prior": -1, "rate_folds": 1}, other_param=("C", 0.5)),
]
BY_NAME = {c.name: c for c in CASES}


@pytest.fixture(scope="module")
def data(scenario, bundle) -> Data:
    held = bundle.held_out
    return Data(scenario.keys[:N_ROWS], scenario.pages[:N_ROWS], scenario.labels[:N_ROWS],
                held["url_proba"], held["page_proba"], held["fused_proba"], held["y"],
                held["page_words"])


@pytest.fixture(scope="module", params=CASES, ids=[c.name for c in CASES])
def fitted(request, data: Data) -> tuple[Case, Any, Any]:
    """(case, the estimator, what its fit returned): fitted once per class."""
    case = request.param
    estimator = case.make()
    return case, estimator, case.fit(estimator, data)


@pytest.fixture(params=CASES, ids=[c.name for c in CASES])
def case(request) -> Case:
    return request.param


def _learned(estimator: Any) -> set[str]:
    return {k for k in vars(estimator) if k.endswith("_") and not k.startswith("_")}


def test_fit_returns_self(fitted) -> None:
    _, estimator, returned = fitted
    assert returned is estimator


def test_init_only_stores_parameters(case: Case) -> None:
    estimator = case.make()
    assert vars(estimator) == estimator.get_params()
    # scikit-learn's own test of fitted state: attributes ending in "_"
    with pytest.raises(SklearnNotFittedError):
        check_is_fitted(estimator)


def test_learned_attributes_end_in_underscore(fitted) -> None:
    _, estimator, _ = fitted
    params = estimator.get_params()
    extra = {k for k in vars(estimator) if k not in params}
    assert extra and all(k.endswith("_") or k.startswith("_") for k in extra), extra
    check_is_fitted(estimator)  # scikit-learn's check passes


def test_clone_gives_an_unfitted_copy_with_equal_params(fitted) -> None:
    _, estimator, _ = fitted
    copy = clone(estimator)
    assert copy is not estimator and type(copy) is type(estimator)
    assert copy.get_params() == estimator.get_params()
    assert _learned(copy) == set()


def test_get_params_and_set_params_round_trip(case: Case) -> None:
    estimator = case.make()
    params = estimator.get_params()
    assert case.make().set_params(**params).get_params() == params
    name, value = case.other_param
    assert estimator.set_params(**{name: value}) is estimator
    assert estimator.get_params()[name] == value


def test_save_and_load_give_identical_predictions_and_a_prefixed_version(
        fitted, data: Data, tmp_path: Path) -> None:
    case, estimator, _ = fitted
    path = estimator.save(tmp_path / case.name)
    loaded = type(estimator).load(path)
    np.testing.assert_array_equal(case.predict(loaded, data), case.predict(estimator, data))
    assert loaded.get_params() == estimator.get_params()
    assert loaded.version == estimator.version
    assert loaded.version.startswith(f"{case.prefix}-")
    assert len(loaded.version) == len(case.prefix) + 1 + 12


def test_tampered_weights_file_is_refused(fitted, tmp_path: Path) -> None:
    case, estimator, _ = fitted
    path = estimator.save(tmp_path / case.name)
    blob = bytearray((path / "weights.npz").read_bytes())
    blob[len(blob) // 2] ^= 0x01
    (path / "weights.npz").write_bytes(bytes(blob))
    with pytest.raises(ModelFileError, match="weights.npz"):
        type(estimator).load(path)


def test_unfitted_use_raises_not_fitted(case: Case, data: Data, tmp_path: Path) -> None:
    estimator = case.make()
    with pytest.raises(NotFittedError, match="not fitted"):
        case.predict(estimator, data)
    with pytest.raises(NotFittedError):
        estimator.save(tmp_path / "never")
    assert not (tmp_path / "never").exists()


@pytest.mark.parametrize(("name", "param", "value"),
                         [(c.name, p, v) for c in CASES for p, v in c.bad_params.items()])
def test_bad_parameter_is_refused_at_fit_naming_it(data: Data, name, param, value) -> None:
    case = BY_NAME[name]
    estimator = case.make().set_params(**{param: value})  # stored as given, not checked
    assert estimator.get_params()[param] == value
    with pytest.raises(ValueError, match=rf"{name}\.{param} must be"):
        case.fit(estimator, data)
    assert _learned(estimator) == set()


@pytest.mark.parametrize("name", ["UrlModel", "PageModel"])
def test_explain_decomposes_each_logit_exactly(url_model, bundle, data: Data, name) -> None:
    model = url_model if name == "UrlModel" else bundle.page_model  # the shared fitted ones
    item = data.keys[3] if name == "UrlModel" else data.pages[3]
    exp = model.explain(item, top=3, n_classes=2)
    logits = model.decision_function([item])[0]
    for cls, rest in zip(exp.classes, exp.rest, strict=True):
        j = model.classes_.index(cls.category)
        total = cls.bias + sum(c.value for c in cls.contributions) + rest
        assert total == pytest.approx(cls.logit, abs=1e-6)
        assert cls.logit == pytest.approx(logits[j], abs=1e-4)
        assert len(cls.contributions) == 3 and rest != 0.0
