"""The URL model on real data no one here wrote (``../shared/data``), against reference
baselines from scikit-learn fitted on the same split. Skips when the data is absent."""

from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np
import pytest

from cascade.evaluate import evaluation_split
from cascade.metrics import accuracy, macro_f1
from cascade.models.url_model import UrlModel
from cascade.urls import normalize

SHARED = Path(os.environ.get("CASCADE_SHARED_DATA",
                             Path(__file__).resolve().parents[1].parent / "shared" / "data"))
DOMAINS = SHARED / "domain-categories" / "domains.csv"

pytestmark = pytest.mark.skipif(not DOMAINS.exists(), reason="shared data not present")


@pytest.fixture(scope="module")
def split_data():
    with DOMAINS.open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    keys, labels = [], []
    for r in rows:
        try:
            keys.append(normalize(r["domain"]))
            labels.append(r["category"])
        except ValueError:
            continue
    split = evaluation_split(keys, None, test_fraction=0.2, seed=0)
    train = ([keys[i] for i in split.train], [labels[i] for i in split.train])
    test = ([keys[i] for i in split.test], [labels[i] for i in split.test])
    return train, test


def test_url_model_beats_reference_baselines_on_domain_categories(split_data) -> None:
    from sklearn.dummy import DummyClassifier
    from sklearn.feature_extraction.text import HashingVectorizer
    from sklearn.linear_model import SGDClassifier
    from sklearn.pipeline import make_pipeline

    (train_keys, train_labels), (test_keys, test_labels) = split_data
    model = UrlModel(calibration_folds=0).fit(train_keys, train_labels)
    classes = model.classes_
    y = np.array([classes.index(lab) for lab in test_labels])
    ours = np.array(model.predict_proba(test_keys).argmax(axis=1))

    # scikit-learn reference pipeline on the same split and the same host strings
    train_text = [k.feature_text for k in train_keys]
    test_text = [k.feature_text for k in test_keys]
    ref = make_pipeline(
        HashingVectorizer(analyzer="char_wb", ngram_range=(1, 5), n_features=2**20),
        SGDClassifier(loss="log_loss", alpha=1e-5, max_iter=30, tol=None, random_state=0),
    ).fit(train_text, train_labels)
    ref_pred = np.array([classes.index(c) for c in ref.predict(test_text)])
    dummy = DummyClassifier(strategy="most_frequent").fit(train_text, train_labels)
    dummy_pred = np.array([classes.index(c) for c in dummy.predict(test_text)])

    print("ours", accuracy(y, ours), macro_f1(y, ours, len(classes)), "ref",
          accuracy(y, ref_pred), macro_f1(y, ref_pred, len(classes)))
    assert accuracy(y, ours) > 1.5 * accuracy(y, dummy_pred)
    # a floor, not the target: on this set (short registered domains, 34 classes) the
    # defaults chosen by cross-validation over three data sets trail this reference
    # (measured 0.88 of its macro-F1 on this split, 0.91 in benchmarks/url_model.py); the
    # floor catches a regression beyond the noise of one 900-row split (common practice,
    # no source)
    assert macro_f1(y, ours, len(classes)) >= 0.85 * macro_f1(y, ref_pred, len(classes))
