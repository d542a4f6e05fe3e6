"""The top-label map: isotonic regression of "the top class was right" on its probability."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from sklearn.isotonic import IsotonicRegression

from cascade.errors import ModelFileError
from cascade.metrics import expected_calibration_error
from cascade.models.calibration import MIN_MAP_ROWS, TopLabelMap, fit_temperature, softmax
from cascade.models.url_model import UrlModel


def _two_faced(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Probabilities too sure where high and not sure enough where low: half the rows say
    0.95 and are right 80% of the time, half say 0.35 and are right 55% of the time. One
    temperature cannot fix both ends (it moves them the same way); a monotone map can."""
    rng = np.random.default_rng(seed)
    k = 6
    high = rng.random(n) < 0.5
    top = np.where(high, 0.95, 0.35)
    proba = np.repeat(((1 - top) / (k - 1))[:, None], k, axis=1)
    winner = rng.integers(0, k, n)
    proba[np.arange(n), winner] = top
    right = rng.random(n) < np.where(high, 0.80, 0.55)
    other = (winner + rng.integers(1, k, n)) % k
    return proba, np.where(right, winner, other)


def test_map_values_are_scikit_learns_isotonic_regression() -> None:
    # reference: sklearn.isotonic.IsotonicRegression on (top probability, top was right)
    rng = np.random.default_rng(3)
    proba = softmax(rng.normal(size=(3000, 5)) * 2.0)
    # the top class is right with probability 0.9 * its probability: a real (monotone) map
    right = rng.random(3000) < 0.9 * proba.max(1)
    y = np.where(right, proba.argmax(1), (proba.argmax(1) + rng.integers(1, 5, 3000)) % 5)
    top_map = TopLabelMap.fit(proba, y)
    assert top_map is not None
    iso = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip").fit(
        proba.max(1), (proba.argmax(1) == y).astype(float))
    probe = softmax(rng.normal(size=(500, 5)) * 2.0)
    expected = iso.predict(probe.max(1))
    mapped = top_map.apply(probe.copy())
    # where the "stay on top" floor does not bind, the top class gets sklearn's value
    free = mapped.max(1) > np.partition(mapped, -2, axis=1)[:, -2] * (1 + 1e-6)
    assert free.mean() > 0.5
    np.testing.assert_allclose(mapped.max(1)[free], expected[free], atol=1e-12)


def test_map_never_changes_the_winner_and_rows_stay_distributions() -> None:
    proba, y = _two_faced(4000, seed=0)
    top_map = TopLabelMap.fit(proba, y)
    assert top_map is not None
    rng = np.random.default_rng(1)
    probe = softmax(rng.normal(size=(2000, 6)) * rng.uniform(0.1, 6, size=(2000, 1)))
    mapped = top_map.apply(probe.copy())
    assert (mapped.argmax(1) == probe.argmax(1)).all()
    np.testing.assert_allclose(mapped.sum(1), 1.0, atol=1e-9)
    assert (mapped >= 0).all()
    for i in range(0, 2000, 97):  # the request path's one-row twin gives the same numbers
        np.testing.assert_allclose(top_map.apply_one(probe[i].copy()), mapped[i], atol=1e-12)


def test_map_fixes_what_a_temperature_cannot() -> None:
    proba, y = _two_faced(8000, seed=0)
    fit_p, fit_y, test_p, test_y = proba[:4000], y[:4000], proba[4000:], y[4000:]
    t = fit_temperature(np.log(fit_p), fit_y)
    scaled = softmax(np.log(test_p) / t)
    top_map = TopLabelMap.fit(softmax(np.log(fit_p) / t), fit_y)
    mapped = top_map.apply(scaled.copy())
    # true ECE of the temperature alone: each half keeps a gap of several hundredths;
    # the map brings each group's confidence to its own rate (0.80 and 0.55) up to
    # sampling noise on 4000 rows
    assert expected_calibration_error(test_y, scaled) > 0.08
    assert expected_calibration_error(test_y, mapped) < 0.03


def test_too_few_rows_fit_no_map() -> None:
    proba, y = _two_faced(MIN_MAP_ROWS - 1, seed=0)
    assert TopLabelMap.fit(proba, y) is None


def test_bad_knots_are_refused() -> None:
    with pytest.raises(ValueError, match="sorted"):
        TopLabelMap(np.array([0.5, 0.2]), np.array([0.1, 0.3]))
    with pytest.raises(ValueError, match="matching"):
        TopLabelMap(np.array([0.5]), np.array([0.1, 0.3]))


def test_url_model_saves_and_loads_its_map(url_model: UrlModel, url_log, tmp_path: Path
                                           ) -> None:
    assert url_model.top_label_map_ is not None
    path = url_model.save(tmp_path / "m")
    meta = json.loads((path / "model.json").read_text())
    assert meta["calibration"]["method"] == "temperature+top-label"
    loaded = UrlModel.load(path)
    urls = [url_log.keys[i] for i in url_log.test[:40]]
    np.testing.assert_allclose(loaded.predict_proba(urls), url_model.predict_proba(urls))
    # a map's probabilities keep the logits' winner
    assert (url_model.predict_proba(urls).argmax(1) ==
            url_model.decision_function(urls).argmax(1)).all()


def test_temperature_only_model_has_no_map(url_log) -> None:
    urls = [url_log.urls[i] for i in url_log.train[:400]]
    labels = [url_log.labels[i] for i in url_log.train[:400]]
    model = UrlModel(n_features=2**16, calibration="temperature", seed=1).fit(urls, labels)
    assert model.top_label_map_ is None
    np.testing.assert_allclose(model.predict_proba(urls[:20]),
                               softmax(model.decision_function(urls[:20])))


def test_a_map_missing_from_the_weights_file_is_refused(url_model: UrlModel, tmp_path: Path,
                                                        monkeypatch) -> None:
    # save a file whose metadata says top-label but whose arrays lack the knots
    state = url_model._file_state

    def without_knots():
        meta, arrays = state()
        return meta, {k: v for k, v in arrays.items() if not k.startswith("top_label")}

    monkeypatch.setattr(url_model, "_file_state", without_knots)
    path = url_model.save(tmp_path / "m")
    with pytest.raises(ModelFileError, match="no top-label knots"):
        UrlModel.load(path)
