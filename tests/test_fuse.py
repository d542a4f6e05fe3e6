"""Fusion of the URL and page probabilities: falls back with a reason, learns when a page
is useless, keeps the URL probabilities for a thin page."""

from __future__ import annotations

import numpy as np
import pytest

from cascade.fuse import Fusion


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


def test_thin_page_rows_keep_the_url_probabilities_exactly():
    rng = np.random.default_rng(2)
    k, n = 3, 200
    y = rng.integers(0, k, n)
    pu = rng.dirichlet(np.ones(k), n)
    pp = rng.dirichlet(np.ones(k), n)
    fusion = Fusion(min_page_words=10).fit(pu, pp, y, np.full(n, 50))
    words = np.array([3, 50, 9, 10])
    fused = fusion.predict_proba(pu[:4], pp[:4], words)
    np.testing.assert_array_equal(fused[[0, 2]], pu[[0, 2]])
    assert not np.allclose(fused[[1, 3]], pu[[1, 3]])
