"""The end-to-end demo on embedded defaults: invent the scenario's lookup log, train every
model on the weeks before a cut, then run a night over the weeks after: score, plan fetches
under a budget, fetch from a loopback site farm through the sandboxed fetcher, fuse, and
write verdicts plus a budget report. Nothing leaves the machine."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

from cascade.errors import UsageError
from cascade.evaluate import evaluate_proba, evaluation_split
from cascade.io import open_writer
from cascade.scenario import generate_telemetry, write_telemetry_csv
from cascade.taxonomy import demo_taxonomy
from cascade.urls import normalize

__all__ = ["DEMO_FOLDS", "DEMO_PAGE_PARAMS", "run_demo"]


def _say(quiet: bool, text: str) -> None:
    if not quiet:
        print(f"demo: {text}", file=sys.stderr, flush=True)


#: The demo's page-model settings: smaller than the library defaults so that ``make demo``
#: trains all models in a few minutes on two cores (the figures in docs/ use the defaults).
DEMO_PAGE_PARAMS: dict[str, Any] = {"n_features": 2**18}
DEMO_FOLDS = 3


def run_demo(out: Path, seed: int = 0, n_sites: int = 2000, quiet: bool = False,
             budget_fraction: float = 0.30) -> dict[str, Any]:
    """Run the whole cascade on the invented scenario into ``out``; returns the report dict
    (also written as report.json), with the budget report under ``out/budget-report``.

    Train (weeks before a time cut): URL model, page model (saved pages of the labelled
    rows), fusion and fetch-value model. Night run (weeks after, new domains only): score every
    URL, plan fetches under the budget, fetch the plan from the loopback site farm through
    the sandboxed fetcher, fuse. Measure: every held-out URL is also fetched once so the
    report can show what each budget would have bought.
    """
    from cascade.budget import Budget, FetchCosts, plan
    from cascade.bundle import fit_bundle
    from cascade.extract import extract
    from cascade.models.page_model import PageModel
    from cascade.report import build_report, write_report
    from cascade.scenario.pages import render_page

    started = time.perf_counter()
    out.mkdir(parents=True, exist_ok=True)
    taxonomy = demo_taxonomy()
    records = generate_telemetry(seed=seed, n_sites=n_sites)
    write_telemetry_csv(records, out / "telemetry.csv")
    _say(quiet, f"invented {len(records)} URLs over {n_sites} sites -> telemetry.csv")
    keys = [normalize(r.url) for r in records]
    labels = [r.label for r in records]
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25, seed=seed)
    if not split.train.size or not split.test.size or len(set(labels)) < 2:
        raise UsageError(f"{n_sites} invented sites are too few for a train and a held-out "
                         f"part (got {len(split.train)} train, {len(split.test)} held-out "
                         "URLs); use --sites 20 or more")
    _say(quiet, f"split {split.method} at {split.cut}: {len(split.train)} train, "
               f"{len(split.test)} test (new domains only)")
    train = split.train
    pages = [extract(render_page(records[i].url, records[i].label, records[i].page_seed),
                     url=records[i].url) for i in train]
    _say(quiet, f"training on {len(train)} labelled URLs with their saved pages "
               f"({DEMO_FOLDS} stacking folds; about 30 s on two cores)")
    t0 = time.perf_counter()
    bundle = fit_bundle([keys[i] for i in train], [labels[i] for i in train], pages,
                        taxonomy=taxonomy, page_model=PageModel(**DEMO_PAGE_PARAMS),
                        folds=DEMO_FOLDS,
                        seed=seed, progress=None if quiet else lambda m: _say(False, m))
    train_s = time.perf_counter() - t0
    model = bundle.url_model
    test = split.test
    test_keys = [keys[i] for i in test]
    proba = model.predict_proba(test_keys)
    test_counts = [records[i].count for i in test]
    metrics = evaluate_proba(proba, [labels[i] for i in test], model.classes_,
                             counts=test_counts)
    metrics["split"] = split.describe()
    by_signal: dict[str, dict[str, float]] = {}
    pred = proba.argmax(axis=1)
    for signal in sorted({records[i].signal for i in test}):
        rows = [j for j, i in enumerate(test) if records[i].signal == signal]
        right = sum(model.classes_[pred[j]] == labels[test[j]] for j in rows)
        by_signal[signal] = {"rows": len(rows), "accuracy": round(right / len(rows), 4)}
    metrics["accuracy_by_url_signal"] = by_signal
    bundle.save(out / "model", metrics=metrics)
    _say(quiet, f"models trained in {train_s:.0f}s -> model/ ({bundle.version})")

    budget = Budget(max_fraction=budget_fraction)
    domains = [k.registered_domain or k.host for k in test_keys]
    fetch_plan = plan([k.url for k in test_keys], proba, bundle.value_model, budget,
                      counts=test_counts, domains=domains)
    with open_writer(out / "plan.jsonl") as writer:
        for item in fetch_plan.fetch + fetch_plan.skipped:
            writer.write(item.to_dict())
    planned = set(int(i) for i in fetch_plan.order())
    _say(quiet, f"plan: fetch {len(planned)} of {len(test)} URLs ({budget_fraction:.0%} "
               "budget, best expected gain per fetch first) -> plan.jsonl")
    plan_urls = [test_keys[i].url for i in fetch_plan.order()]
    results, fetch_report = _fetch_from_farm(records, plan_urls, [k.url for k in test_keys],
                                             budget, out, quiet)
    planned = {i for i, k in enumerate(test_keys) if k.url in fetch_report["by_plan"]}
    night_fetches = {u: r for u, r in results.items() if u in fetch_report["by_plan"]}
    reasons = {item.url: fetch_report["meter_reasons"].get(item.url, item.reason)
               for item in fetch_plan.items}
    verdicts = bundle.verdicts(test_keys, url_proba=proba, fetches=night_fetches,
                               plan=reasons)
    with open_writer(out / "verdicts.jsonl") as writer:
        for v in verdicts:
            writer.write(v.to_dict())
    # every held-out URL was fetched once, for measuring what other budgets would buy
    fused = bundle.predict_proba(test_keys, bundle.pages_from_fetches(
        [results.get(k.url) for k in test_keys]), url_proba=proba)
    y = np.array([model.classes_.index(labels[i]) for i in test])
    cascade_proba = proba.copy()
    rows = sorted(planned)
    cascade_proba[rows] = fused[rows]
    w = np.array(test_counts, dtype=np.float64)
    gain = bundle.expected_gain(proba, domains, urls=test_keys)["gain"]
    # every held-out URL was fetched: the budget rows' bytes, seconds and failures are the
    # measured ones, per domain, as an earlier night's fetch results would give them
    measured = FetchCosts.from_history(
        {"domain": k.registered_domain or k.host, "ok": r.ok, "bytes": float(r.bytes_read),
         "ms": float(r.elapsed_ms)}
        for k in test_keys if (r := results.get(k.url)) is not None)
    rep = build_report(y, proba, fused, gain, model.classes_, costs=taxonomy.costs(),
                       counts=w, operating_budget=budget_fraction, fetch_costs=measured,
                       domains=domains,
                       risk={c.name: c.risk for c in taxonomy.categories},
                       title="cascade demo: what each fetch budget buys",
                       context={"scenario": "Tallowmere Rail Cooperative (invented)",
                                "model": bundle.version, "held-out URLs": len(test),
                                "weighted by": "lookup counts",
                                "planner": bundle.planner_name})
    paths = write_report(rep, out / "budget-report")
    night = _night_job(bundle, records, test, budget_fraction, out, quiet)

    def acc(p: np.ndarray, weights: np.ndarray | None = None) -> float:
        right = (p.argmax(axis=1) == y).astype(float)
        return round(float(np.average(right, weights=weights)), 4)

    headline = {
        "urls": len(records),
        "test_rows": len(test),
        "url_model_accuracy": round(metrics["accuracy"], 4),
        "url_model_macro_f1": round(metrics["macro_f1"], 4),
        "url_model_ece_15": round(metrics["ece_15"], 4),
        "fetched_by_plan": len(planned),
        "cascade_accuracy": acc(cascade_proba),
        "cascade_accuracy_weighted_by_lookups": acc(cascade_proba, w),
        "url_only_accuracy_weighted_by_lookups": acc(proba, w),
        "fetch_all_accuracy": acc(fused),
        "budget_for_90pct_of_fetch_all_gain": rep["budget_for_gain_share"]["planner"]["90%"],
        "fetch_outcomes": fetch_report["outcomes"],
        "plan_spent": fetch_report["plan_spent"],
        "night_store": str(out / "store.sqlite"),
        "night_coverage_after": night["coverage_after"]["share"],
        "night_review_queue": night.get("review_queue", 0),
        "train_seconds": round(train_s, 1),
        "seconds": round(time.perf_counter() - started, 1),
    }
    fetch_report["by_plan"] = len(fetch_report["by_plan"])
    fetch_report.pop("meter_reasons")
    report = {"scenario": "Tallowmere Rail Cooperative (invented)", "seed": seed,
              "taxonomy": taxonomy.name, "model_version": bundle.version,
              "headline": headline, "metrics": metrics, "fetch": fetch_report,
              "budget_table": rep["budget_table"], "stacking": bundle.report,
              "night": night,
              "explain_examples": [model.explain(k, top=5, n_classes=1).to_dict()
                                   for k in test_keys[:5]]}
    (out / "report.json").write_text(json.dumps(report, indent=2, ensure_ascii=False) + "\n",
                                     encoding="utf-8")
    (out / "summary.md").write_text(_summary_markdown(report), encoding="utf-8")
    _say(quiet, f"wrote verdicts.jsonl, report.json, summary.md, {paths['html']}")
    return report


def _night_job(bundle: Any, records: list, test: Any, budget_fraction: float, out: Path,
               quiet: bool) -> dict[str, Any]:
    """The night as a team runs it: the held-out URLs' lookups as the day's log, the nightly
    job (``cascade night``) with the same budget into the verdict store ``store.sqlite``,
    fetching from the loopback site farm; its changes, review queue and report in
    ``night/``."""
    import csv

    from cascade.batch import NightOptions, run_night
    from cascade.budget import Budget
    from cascade.fetch import Fetcher, FetchPolicy
    from cascade.scenario.site_farm import SiteFarm
    from cascade.store import VerdictStore

    log = out / "night-log.csv"
    with log.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(["url", "count"])
        for i in test:
            writer.writerow([records[i].url, records[i].count])
    store_path = out / "store.sqlite"
    for stale in (store_path, store_path.with_name(store_path.name + "-wal"),
                  store_path.with_name(store_path.name + "-shm")):
        stale.unlink(missing_ok=True)  # the demo starts a fresh store each time
    with SiteFarm(records) as farm, VerdictStore.open(store_path) as store:
        policy = FetchPolicy(ports=(farm.port,), allow_networks=("127.0.0.1/32",),
                             per_host_delay_s=0.0, deadline_s=5.0)

        def target(url: str) -> str:
            key = normalize(url)
            return f"http://{key.host}:{farm.port}{key.path}" + (
                f"?{key.query}" if key.query else "")

        result = run_night(bundle, store, log, out / "night",
                           options=NightOptions(budget=Budget(max_fraction=budget_fraction),
                                                progress=False if quiet else None),
                           fetcher_factory=lambda: Fetcher(policy, farm.resolver()),
                           fetch_target=target,
                           say=None if quiet else lambda m: _say(False, f"night: {m}"))
    _say(quiet, f"night job {result.run_id}: store.sqlite, night/review-queue.jsonl, "
                "night/night-report.json")
    return result.report


def _fetch_from_farm(records: list, plan_urls: list[str], all_urls: list[str], budget: Any,
                     out: Path, quiet: bool) -> tuple[dict[str, Any], dict[str, Any]]:
    """Fetch from the loopback site farm through the sandboxed fetcher (the farm plays every
    scenario site; the address guard's only hole is the farm's 127.0.0.1): first the plan, in
    its order, metered so that the real spend stays within ``budget``; then, for measuring
    other budgets only, every other held-out URL."""
    import asyncio
    from collections import Counter

    from cascade.budget_meter import BudgetMeter, fetch_within_budget
    from cascade.fetch import Fetcher, FetchPolicy
    from cascade.scenario.site_farm import SiteFarm

    outcomes: Counter[str] = Counter()
    results: dict[str, Any] = {}
    by_plan: set[str] = set()
    meter_reasons: dict[str, str] = {}
    with SiteFarm(records) as farm:
        policy = FetchPolicy(ports=(farm.port,), allow_networks=("127.0.0.1/32",),
                             per_host_delay_s=0.0, deadline_s=5.0)
        meter = BudgetMeter.for_policy(budget, len(all_urls), policy)
        back: dict[str, str] = {}

        def local(url: str) -> str:
            key = normalize(url)
            target = f"http://{key.host}:{farm.port}{key.path}" + (
                f"?{key.query}" if key.query else "")
            back[target] = url
            return target

        async def run() -> float:
            started = time.perf_counter()
            async with Fetcher(policy, farm.resolver()) as fetcher:
                with open_writer(out / "fetches.jsonl") as writer:
                    def keep(result: Any, stage: str) -> None:
                        outcomes[str(result.outcome)] += 1
                        results[back.get(result.url, result.url)] = result
                        row = result.to_dict(with_text=False)
                        row["text_chars"] = len(result.text or "")
                        row["fetched_for"] = stage
                        writer.write(row)

                    async for target, result, why in fetch_within_budget(
                            fetcher, [local(u) for u in plan_urls], meter,
                            window=policy.concurrency):
                        if result is not None:
                            by_plan.add(back[target])
                            keep(result, "plan")
                        else:
                            meter_reasons[back[target]] = str(why)
                    rest = [local(u) for u in all_urls if u not in by_plan]
                    async for result in fetcher.fetch_many(rest):
                        keep(result, "measurement")
            return time.perf_counter() - started

        seconds = asyncio.run(run())
    _say(quiet, f"fetched {len(by_plan)} planned URLs within the budget (spent "
               f"{meter.spent()}), then the other {len(all_urls) - len(by_plan)} held-out "
               f"URLs for measurement only, in {seconds:.1f}s -> fetches.jsonl")
    return results, {"fetched": len(results), "outcomes": dict(outcomes),
                     "by_plan": by_plan, "plan_spent": meter.spent(),
                     "meter_reasons": meter_reasons,
                     "pages_per_s": round(len(results) / seconds, 1) if seconds else None}


def _summary_markdown(report: dict[str, Any]) -> str:
    h = report["headline"]
    m = report["metrics"]
    lines = [
        "# cascade demo: one night of the cascade",
        "",
        f"Scenario: {report['scenario']}, seed {report['seed']}; model {report['model_version']}.",
        "",
        "| figure | value |",
        "| --- | --- |",
        f"| URLs in the invented log | {h['urls']} |",
        f"| held-out URLs (new domains after the time cut) | {h['test_rows']} |",
        f"| URL model: accuracy / macro-F1 / ECE (15 bins) | {h['url_model_accuracy']:.4f} / "
        f"{h['url_model_macro_f1']:.4f} / {h['url_model_ece_15']:.4f} |",
        f"| URLs the plan fetched | {h['fetched_by_plan']} |",
        f"| cascade accuracy (plan fetched, rest URL-only) | {h['cascade_accuracy']:.4f} |",
        f"| same, weighted by lookups (URL-only: {h['url_only_accuracy_weighted_by_lookups']:.4f})"
        f" | {h['cascade_accuracy_weighted_by_lookups']:.4f} |",
        f"| accuracy if every held-out URL were fetched | {h['fetch_all_accuracy']:.4f} |",
        f"| budget for 90% of the fetch-everything gain | "
        f"{h['budget_for_90pct_of_fetch_all_gain']} |",
        "| fetch outcomes | " + (", ".join(f"{k} {v}" for k, v in sorted(
            h["fetch_outcomes"].items())) or "none") + " |",
        "",
        "## What each budget buys (accuracy weighted by lookups)",
        "",
        "| budget | planner | lowest confidence | random | oracle |",
        "| --- | --- | --- | --- | --- |",
    ]
    for row in report["budget_table"]:
        lines.append(f"| {row['budget']:.0%} | " + " | ".join(
            f"{row[s]['accuracy']:.4f}" for s in ("planner", "lowest-confidence", "random",
                                                   "oracle")) + " |")
    night = report.get("night")
    if night:
        lines += ["", "## The nightly job (store.sqlite, night/)", "",
                  f"Run {night['run_id']}: {night['decided']} URLs decided, "
                  f"{night['spent']['fetches']} fetches; lookups with a trusted verdict "
                  f"{night['coverage_before']['share']:.1%} before, "
                  f"{night['coverage_after']['share']:.1%} after; "
                  f"{night.get('review_queue', 0)} URLs in night/review-queue.jsonl."]
    lines += ["", "Plots and more figures: budget-report/report.html.", "",
              "## URL model accuracy by what the URL string says", "",
              "| URL signal | rows | accuracy |", "| --- | --- | --- |"]
    for signal, row in m["accuracy_by_url_signal"].items():
        lines.append(f"| {signal} | {row['rows']} | {row['accuracy']:.4f} |")
    lines += ["", "Opaque names and shared hosts are where the URL says nothing: those are the",
              "lookups a page fetch is for. Categories are probabilities; the policy owner",
              "decides what to block.", ""]
    return "\n".join(lines)
