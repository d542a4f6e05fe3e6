"""Shared, session-scoped fixtures: the small invented scenario and the models trained on it,
each built once for the whole run (training is the slow part of the suite).

The fitted objects are shared: a test may read them, save them or predict with them, but
must not refit them or change their parameters (fit a fresh estimator for that).
"""

from __future__ import annotations

import csv
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

# The solvers run one L-BFGS problem at a time; BLAS threads only fight each other (and
# any other process) for the cores. Set before numpy loads; subprocesses inherit it.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
import scipy.optimize  # noqa: E402,F401 - loads scipy's BLAS so the limit below reaches it
from threadpoolctl import threadpool_limits  # noqa: E402

threadpool_limits(1)  # in case numpy was imported before this file set the variables

if TYPE_CHECKING:
    from cascade.bundle import ModelBundle
    from cascade.extract import PageText
    from cascade.models.url_model import UrlModel
    from cascade.scenario import TelemetryRecord
    from cascade.urls import UrlKey

#: The small scenario every model test shares: 160 invented sites, about 850 URLs.
SCENARIO_SEED = 3
SCENARIO_SITES = 160
#: Rows of the scenario the shared bundle is trained on (the rest are never seen by it).
BUNDLE_ROWS = 500
#: Rows of the scenario the CLI is trained on with saved pages (every fifth without one).
CLI_PAGE_ROWS = 600


@dataclass(frozen=True)
class Scenario:
    """Invented lookup records in first-sighting order, their normalized keys and the
    extracted text of each record's page (as the site farm serves it)."""

    records: list[TelemetryRecord]
    keys: list[UrlKey]
    pages: list[PageText]
    seed: int = SCENARIO_SEED
    n_sites: int = SCENARIO_SITES

    @property
    def urls(self) -> list[str]:
        return [r.url for r in self.records]

    @property
    def labels(self) -> list[str]:
        return [r.label for r in self.records]


@dataclass(frozen=True)
class UrlLog:
    """A larger URL-only log, split by registered domain: ``test`` rows come from domains
    that no ``train`` row has (new sites, as in use)."""

    records: list[TelemetryRecord]
    keys: list[UrlKey]
    train: np.ndarray
    test: np.ndarray

    @property
    def urls(self) -> list[str]:
        return [r.url for r in self.records]

    @property
    def labels(self) -> list[str]:
        return [r.label for r in self.records]


def domain_hash_unit(text: str | None) -> float:
    """A stable number in [0, 1) per text (not Python's salted ``hash``)."""
    return int(hashlib.sha256(str(text).encode()).hexdigest()[:8], 16) / 16**8


@pytest.fixture(scope="session")
def scenario() -> Scenario:
    from cascade.extract import extract
    from cascade.scenario import generate_telemetry
    from cascade.scenario.pages import render_page
    from cascade.urls import normalize

    records = generate_telemetry(seed=SCENARIO_SEED, n_sites=SCENARIO_SITES)
    keys = [normalize(r.url) for r in records]
    pages = [extract(render_page(r.url, r.label, r.page_seed), url=r.url) for r in records]
    return Scenario(records, keys, pages)


@pytest.fixture(scope="session")
def url_log() -> UrlLog:
    from cascade.scenario import generate_telemetry
    from cascade.urls import normalize

    records = generate_telemetry(seed=3, n_sites=400)
    keys = [normalize(r.url) for r in records]
    new = np.array([domain_hash_unit(k.registered_domain) < 0.25 for k in keys])
    return UrlLog(records, keys, np.flatnonzero(~new), np.flatnonzero(new))


@pytest.fixture(scope="session")
def url_model(url_log: UrlLog) -> UrlModel:
    """A small URL model (2**16 columns, 40 iterations, seed 1) fitted on the train side of
    ``url_log`` over the demo taxonomy."""
    from cascade.models.url_model import UrlModel
    from cascade.taxonomy import demo_taxonomy

    return UrlModel(n_features=2**16, max_iter=40, seed=1).fit(
        [url_log.keys[i] for i in url_log.train], [url_log.labels[i] for i in url_log.train],
        taxonomy=demo_taxonomy())


@pytest.fixture(scope="session")
def bundle(scenario: Scenario) -> ModelBundle:
    """All four models stacked on the first ``BUNDLE_ROWS`` rows of the scenario, each row
    with its page, small settings (2**16 columns, 40 iterations, 3 folds)."""
    from cascade.bundle import fit_bundle
    from cascade.models.page_model import PageModel
    from cascade.models.url_model import UrlModel
    from cascade.taxonomy import demo_taxonomy

    rows = slice(0, BUNDLE_ROWS)
    return fit_bundle(scenario.keys[rows], scenario.labels[rows], scenario.pages[rows],
                      taxonomy=demo_taxonomy(),
                      url_model=UrlModel(n_features=2**16, max_iter=40),
                      page_model=PageModel(n_features=2**16, max_iter=40), folds=3)


@pytest.fixture(scope="session")
def cli_model_dir(tmp_path_factory: pytest.TempPathFactory, scenario: Scenario) -> Path:
    """A folder with ``labelled.csv`` (the scenario) and ``model/``, a URL-only model
    trained by ``cascade train`` with a held-out measurement. Treat it as read-only."""
    from cascade.cli import EXIT_OK, main
    from cascade.scenario import write_telemetry_csv

    root = tmp_path_factory.mktemp("cli")
    write_telemetry_csv(scenario.records, root / "labelled.csv")
    code = main(["--quiet", "train", "--input", str(root / "labelled.csv"), "--model",
                 str(root / "model"), "--taxonomy", "demo", "--max-iter", "40",
                 "--hash-bits", "16"])
    assert code == EXIT_OK
    return root


@pytest.fixture(scope="session")
def cli_pages_dir(tmp_path_factory: pytest.TempPathFactory, scenario: Scenario) -> Path:
    """A folder with ``train.csv`` (the first ``CLI_PAGE_ROWS`` scenario rows, a saved page
    for four rows in five), ``saved/`` and ``model/`` trained by ``cascade train --pages``
    (URL model, page model, fusion, fetch-value model). Treat it as read-only."""
    from cascade.cli import EXIT_OK, main
    from cascade.scenario.pages import render_page

    root = tmp_path_factory.mktemp("pages")
    (root / "saved").mkdir()
    with (root / "train.csv").open("w", newline="") as fh:
        out = csv.writer(fh)
        out.writerow(["url", "label", "page"])
        for i, r in enumerate(scenario.records[:CLI_PAGE_ROWS]):
            name = f"p{i}.html"
            if i % 5:  # every fifth row has no saved page: it trains the URL model only
                (root / "saved" / name).write_text(render_page(r.url, r.label, r.page_seed))
                out.writerow([r.url, r.label, name])
            else:
                out.writerow([r.url, r.label, ""])
    code = main(["--quiet", "train", "-i", str(root / "train.csv"), "-m", str(root / "model"),
                 "--pages", str(root / "saved"), "--hash-bits", "16", "--max-iter", "40",
                 "--holdout", "0", "--folds", "3"])
    assert code == EXIT_OK
    return root
