"""Prior-shift re-estimation (``cascade.prior_shift``) against closed forms and known
truths, and its wiring into the nightly job and the CLI.

The synthetic cases draw from known class-conditional densities (1-D Gaussians, shared
variance), so the Bayes-optimal posterior under any priors is known exactly."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from conftest import BUNDLE_ROWS
from scipy.optimize import minimize
from scipy.stats import norm
from sklearn.base import clone

from cascade.batch import NightOptions, night_run_id, run_night
from cascade.budget import Budget
from cascade.cli import EXIT_OK, main
from cascade.errors import DataError, NotFittedError, UsageError
from cascade.prior_shift import PriorShift, adjust_posteriors, adjust_to_batch, training_priors
from cascade.store import VerdictStore
from cascade.urls import normalize

MEANS = np.array([-2.0, 0.0, 2.0])
TRAIN = np.array([0.5, 0.3, 0.2])


def _sample(priors: np.ndarray, n: int, seed: int, scale: float = 1.0
            ) -> tuple[np.ndarray, np.ndarray]:
    """Points drawn with class priors ``priors`` from N(MEANS[c], scale**2), and the labels."""
    rng = np.random.default_rng(seed)
    y = rng.choice(len(priors), size=n, p=priors)
    return rng.normal(MEANS[y], scale), y


def _bayes(x: np.ndarray, priors: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """The Bayes-optimal posterior p(c|x) under ``priors``: prior x density, normalized."""
    joint = priors * norm.pdf(x[:, None], loc=MEANS, scale=scale)
    return joint / joint.sum(axis=1, keepdims=True)


# ---------------------------------------------------------------- against known truths
def test_em_recovers_known_shifted_priors() -> None:
    shifted = np.array([0.1, 0.3, 0.6])
    x, _ = _sample(shifted, 20_000, seed=1)
    shift = PriorShift().fit(_bayes(x, TRAIN), TRAIN)
    # Saerens, Latinne and Decaestecker 2002 (Neural Computation 14(1)), section 2.3: the
    # EM iterates converge to the maximum-likelihood priors of the new data; with 20,000
    # draws from Bayes-optimal posteriors that is the true mix within a few 1e-3 (binomial
    # standard error ~ sqrt(0.25 / 20000) = 0.0035, inflated by class overlap).
    assert shift.converged_
    np.testing.assert_allclose(shift.priors_, shifted, atol=0.02)


def test_adjusted_posteriors_are_bayes_rule_with_the_new_priors() -> None:
    x, _ = _sample(TRAIN, 500, seed=2)
    new = np.array([0.2, 0.2, 0.6])
    # Bayes' rule: p'(c|x) = pi'_c f_c(x) / sum_j pi'_j f_j(x), computed from the densities
    np.testing.assert_allclose(adjust_posteriors(_bayes(x, TRAIN), TRAIN, new),
                               _bayes(x, new), rtol=0, atol=1e-12)


def test_em_result_is_the_maximum_likelihood_priors() -> None:
    x, _ = _sample(np.array([0.25, 0.5, 0.25]), 3_000, seed=3, scale=1.5)
    post = _bayes(x, TRAIN, scale=1.5)
    shift = PriorShift(tol=1e-10, max_iter=5000, min_prior=0).fit(post, TRAIN)

    # Saerens et al. 2002, eq. 2.7: the log-likelihood of the new data as a function of the
    # new priors is sum_i log sum_c p(c|x_i) pi'_c / pi_c (+ a constant); maximized here by
    # scipy's L-BFGS over a softmax parametrization, independently of the EM code
    def nll(z: np.ndarray) -> float:
        p = np.exp(z - z.max())
        p /= p.sum()
        return -float(np.mean(np.log(post @ (p / TRAIN))))

    best = minimize(nll, np.zeros(3), method="L-BFGS-B", options={"gtol": 1e-12}).x
    mle = np.exp(best - best.max()) / np.exp(best - best.max()).sum()
    np.testing.assert_allclose(shift.priors_, mle, atol=1e-4)


def test_log_likelihood_never_decreases() -> None:
    x, _ = _sample(np.array([0.05, 0.15, 0.8]), 5_000, seed=4, scale=1.8)  # overlap: slow EM
    shift = PriorShift(tol=1e-9, max_iter=500, min_prior=0).fit(_bayes(x, TRAIN, 1.8), TRAIN)
    trace = shift.log_likelihood_
    assert shift.n_iter_ > 10 and len(trace) == shift.n_iter_ + 1
    # Dempster, Laird and Rubin 1977 (JRSS B 39(1)), theorem 1: an EM step never lowers
    # the likelihood
    assert np.all(np.diff(trace) >= -1e-12)
    assert trace[0] == 0.0 and trace[-1] > 0


def test_unchanged_priors_give_the_identity() -> None:
    x, _ = _sample(TRAIN, 4_000, seed=5)
    post = _bayes(x, TRAIN)
    # a fixed point of the EM map (Saerens et al. 2002, eq. 2.9-2.10): when the training
    # priors are exactly the batch's mean posterior, the first iterate returns them
    exact = PriorShift().fit(post, post.mean(axis=0))
    assert exact.converged_ and exact.n_iter_ == 1
    np.testing.assert_allclose(exact.transform(post), post, atol=1e-12)
    # drawn with the training priors themselves: the estimate stays near them
    near = PriorShift().fit(post, TRAIN)
    np.testing.assert_allclose(near.priors_, TRAIN, atol=0.02)
    assert np.abs(near.transform(post) - post).max() < 0.05


# ---------------------------------------------------------------- degenerate cases
def test_a_class_without_training_prior_stays_at_zero() -> None:
    x, _ = _sample(np.array([0.3, 0.3, 0.4]), 2_000, seed=6)
    post = _bayes(x, TRAIN)
    post[:, 1] = 1e-9
    post /= post.sum(axis=1, keepdims=True)
    shift = PriorShift().fit(post, [600, 0, 400])
    assert shift.priors_[1] == 0.0 and shift.priors_.sum() == pytest.approx(1.0)
    assert np.all(shift.transform(post)[:, 1] == 0.0)


def test_a_tiny_batch_is_returned_unchanged_with_a_note() -> None:
    x, _ = _sample(TRAIN, 49, seed=7)
    post = _bayes(x, TRAIN)
    shift = PriorShift(min_rows=50).fit(post, TRAIN)
    assert not shift.applied_ and shift.n_iter_ == 0
    assert "49" in shift.note_ and "min_rows=50" in shift.note_
    np.testing.assert_array_equal(shift.transform(post), post)
    np.testing.assert_allclose(shift.priors_, TRAIN)


@pytest.mark.parametrize("bad, match", [
    (np.array([[0.5, 0.6, -0.1]]), "outside"),
    (np.array([[0.5, 0.4, 0.2]]), "sum to 1"),
    (np.array([[np.nan, 0.5, 0.5]]), "NaN"),
    (np.array([0.2, 0.3, 0.5]), "2-D"),
])
def test_invalid_probability_rows_raise_a_typed_error(bad: np.ndarray, match: str) -> None:
    with pytest.raises(DataError, match=match):
        PriorShift().fit(bad, TRAIN)


def test_bad_training_priors_and_parameters_raise_typed_errors() -> None:
    post = _bayes(_sample(TRAIN, 100, seed=8)[0], TRAIN)
    with pytest.raises(DataError, match="one number per class"):
        PriorShift().fit(post, [0.5, 0.5])
    with pytest.raises(DataError, match="non-negative"):
        PriorShift().fit(post, [0.5, -0.1, 0.6])
    with pytest.raises(DataError, match="columns"):
        PriorShift().fit(post, TRAIN).transform(post[:, :2])
    for params in ({"max_iter": 0}, {"tol": 0}, {"min_prior": 0.5}, {"min_rows": 0}):
        with pytest.raises(UsageError):
            PriorShift(**params).fit(post, TRAIN)
    with pytest.raises(NotFittedError):
        PriorShift().transform(post)


def test_it_follows_the_estimator_contract() -> None:
    shift = PriorShift(max_iter=7, min_rows=10)
    assert clone(shift).get_params() == {"max_iter": 7, "tol": 1e-6, "min_prior": 1e-6,
                                         "min_rows": 10}
    assert not hasattr(shift, "priors_")
    assert shift.fit(_bayes(_sample(TRAIN, 100, seed=9)[0], TRAIN), TRAIN) is shift


# ---------------------------------------------------------------- the model's priors
def test_training_priors_come_from_the_models_class_counts(url_model) -> None:
    counts = url_model.training_["class_counts"]
    expected = np.array([counts[c] for c in url_model.classes_], dtype=float)
    # rows weighted by (1 / frequency) ** b learn priors proportional to count ** (1 - b)
    expected = np.where(expected > 0, expected ** (1.0 - url_model.class_balance), 0.0)
    np.testing.assert_allclose(training_priors(url_model), expected / expected.sum())

    class Bare:
        classes_ = ["a", "b"]
        training_: dict = {}

    with pytest.raises(DataError, match="class counts"):
        training_priors(Bare())


# ---------------------------------------------------------------- the nightly job
def _write_log(records, path: Path) -> None:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["url", "count"])
        for r in records:
            w.writerow([r.url, r.count])


@pytest.fixture(scope="module")
def skewed_log(scenario, tmp_path_factory) -> tuple[Path, list]:
    """Rows the shared bundle never saw, news and health kept whole, the rest thinned
    (another class mix than training's)."""
    unseen = scenario.records[BUNDLE_ROWS:]
    keep = [r for i, r in enumerate(unseen) if r.label in ("news", "health") or i % 4 == 0]
    path = tmp_path_factory.mktemp("prior-night") / "log.csv"
    _write_log(keep, path)
    return path, keep


def _night(bundle, log: Path, tmp: Path, prior_shift: bool):
    with VerdictStore.open(tmp / "v.sqlite") as store:
        return run_night(bundle, store, log, tmp / "out",
                         options=NightOptions(budget=Budget(max_fetches=0), progress=False,
                                              prior_shift=prior_shift))


def test_the_night_records_estimated_and_training_priors(bundle, skewed_log,
                                                         tmp_path: Path) -> None:
    log, records = skewed_log
    result = _night(bundle, log, tmp_path, prior_shift=True)
    shift = result.report["prior_shift"]
    assert shift["applied"] and shift["iterations"] >= 1 and shift["rows"] == len(records)
    assert set(shift["estimated_priors"]) == set(shift["training_priors"]) == \
        set(bundle.classes)
    assert shift["training_priors"]["news"] == pytest.approx(
        float(training_priors(bundle.url_model)[bundle.classes.index("news")]), abs=1e-4)
    assert shift["estimated_priors"] != shift["training_priors"]
    written = json.loads(result.paths["report"].read_text())
    assert written["prior_shift"] == shift
    assert "Class mix (prior shift)" in result.paths["summary"].read_text()
    # the stored URL verdicts carry the adjusted probabilities (the night's URLs, deduped)
    keys = list(dict.fromkeys(normalize(r.url).url for r in records))
    adjusted, _ = adjust_to_batch(bundle.url_proba(keys), bundle.url_model)
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        stored = [store.get(u).verdict.confidence for u in keys]
    np.testing.assert_allclose(stored, adjusted.max(axis=1), atol=1e-9)
    assert np.abs(adjusted.max(axis=1) - bundle.url_proba(keys).max(axis=1)).max() > 1e-3


def test_the_night_is_unchanged_without_the_option(bundle, skewed_log, tmp_path: Path) -> None:
    log, records = skewed_log
    result = _night(bundle, log, tmp_path, prior_shift=False)
    assert "prior_shift" not in result.report
    assert result.run_id == night_run_id(log, bundle, Budget(max_fetches=0))
    assert result.run_id != night_run_id(log, bundle, Budget(max_fetches=0), prior_shift=True)
    first = bundle.verdicts([records[0].url])[0]
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        assert store.get(first.url).verdict.confidence == pytest.approx(first.confidence)


def test_a_small_night_keeps_its_probabilities_and_says_why(bundle, scenario,
                                                            tmp_path: Path) -> None:
    log = tmp_path / "small.csv"
    _write_log(scenario.records[-20:], log)
    shift = _night(bundle, log, tmp_path, prior_shift=True).report["prior_shift"]
    assert not shift["applied"] and shift["iterations"] == 0
    assert "min_rows" in shift["note"]


# ---------------------------------------------------------------- the command line
def test_report_and_night_commands_take_prior_shift(cli_model_dir: Path, cli_pages_dir: Path,
                                                    tmp_path: Path) -> None:
    pages = cli_pages_dir  # the report needs a page model and saved pages
    code = main(["--quiet", "report", "-m", str(pages / "model"), "-i",
                 str(pages / "train.csv"), "--pages", str(pages / "saved"), "--out",
                 str(tmp_path / "rep"), "--seeds", "1", "--prior-shift"])
    root = cli_model_dir
    assert code == EXIT_OK
    rep = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert rep["prior_shift"]["applied"] and "true_mix" in rep["prior_shift"]
    assert "prior shift" in rep["context"]
    with (root / "labelled.csv").open(encoding="utf-8") as fh:
        urls = [row["url"] for row in csv.DictReader(fh)][:200]
    (tmp_path / "log.txt").write_text("\n".join(urls) + "\n")
    code = main(["--quiet", "night", "--log", str(tmp_path / "log.txt"), "-m",
                 str(root / "model"), "--store", str(tmp_path / "v.sqlite"), "--out",
                 str(tmp_path / "night"), "--budget", "0", "--prior-shift"])
    assert code == EXIT_OK
    night = json.loads((tmp_path / "night" / "night-report.json").read_text())
    assert night["prior_shift"]["applied"]
