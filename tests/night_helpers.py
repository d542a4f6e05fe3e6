"""Shared pieces of the nightly-job tests: a small trained bundle, a night's log, and a
fetcher pointed at the loopback site farm (importable by a child process, which the crash
test kills)."""

from __future__ import annotations

import csv
import sys
from pathlib import Path

from cascade.fetch import Fetcher, FetchPolicy
from cascade.scenario import generate_telemetry
from cascade.urls import normalize


def scenario(seed: int = 4, n_sites: int = 220):
    return generate_telemetry(seed=seed, n_sites=n_sites)


def train_small_bundle(records, path: Path) -> None:
    """A small bundle on the first two thirds of the scenario, saved at ``path``."""
    from cascade.bundle import fit_bundle
    from cascade.extract import extract
    from cascade.models.page_model import PageModel
    from cascade.models.url_model import UrlModel
    from cascade.scenario.pages import render_page
    from cascade.taxonomy import demo_taxonomy

    train = records[: 2 * len(records) // 3]
    pages = [extract(render_page(r.url, r.label, r.page_seed), url=r.url) for r in train]
    bundle = fit_bundle([r.url for r in train], [r.label for r in train], pages,
                        taxonomy=demo_taxonomy(), folds=3,
                        url_model=UrlModel(n_features=2**16, max_iter=40),
                        page_model=PageModel(n_features=2**16, max_iter=40))
    bundle.save(path)


def write_log(records, path: Path) -> None:
    """The night's log: the last third of the scenario, one row per URL with its count."""
    night = records[2 * len(records) // 3:]
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["url", "count"])
        for r in night:
            w.writerow([r.url, r.count])


def farm_fetcher_factory(port: int, host_names: list[str]):
    """A function making a fetcher that reaches only the farm on 127.0.0.1:``port``."""
    from cascade.fetch import StaticResolver

    answers = {h: ["127.0.0.1"] for h in host_names}

    def make() -> Fetcher:
        policy = FetchPolicy(ports=(port,), allow_networks=("127.0.0.1/32",),
                             per_host_delay_s=0.0, deadline_s=5.0, concurrency=8)
        return Fetcher(policy, StaticResolver(answers))

    return make


def farm_target(port: int):
    def target(url: str) -> str:
        key = normalize(url)
        return f"http://{key.host}:{port}{key.path}" + (f"?{key.query}" if key.query else "")

    return target


def main() -> None:  # pragma: no cover - run as a child process by the crash test
    """``python night_helpers.py MODEL STORE LOG OUT PORT HOSTS_FILE``: one night."""
    from cascade.batch import NightOptions, run_night
    from cascade.budget import Budget
    from cascade.bundle import ModelBundle
    from cascade.store import VerdictStore

    model, store_path, log, out, port, hosts = sys.argv[1:7]
    names = Path(hosts).read_text().split()
    bundle = ModelBundle.load(model)
    with VerdictStore.open(store_path) as store:
        run_night(bundle, store, log, out,
                  options=NightOptions(budget=Budget(max_fraction=0.5), write_every=2,
                                       progress=False),
                  fetcher_factory=farm_fetcher_factory(int(port), names),
                  fetch_target=farm_target(int(port)), run_id="crash-night")


if __name__ == "__main__":  # pragma: no cover
    main()
