"""The end-to-end demo on embedded defaults: invent the scenario's lookup log, train the URL
model on the weeks before a cut, measure it on the weeks after, score the whole log, and
write a report folder. Nothing leaves the machine."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import Any

from cascade.evaluate import evaluate_proba, evaluation_split
from cascade.io import open_writer
from cascade.models.url_model import UrlModel
from cascade.scenario import generate_telemetry, write_telemetry_csv
from cascade.taxonomy import demo_taxonomy
from cascade.urls import normalize
from cascade.verdict import url_verdicts


def _say(quiet: bool, text: str) -> None:
    if not quiet:
        print(f"demo: {text}", file=sys.stderr, flush=True)


def run_demo(out: Path, seed: int = 0, n_sites: int = 2000, quiet: bool = False,
             max_fetches: int = 400) -> dict[str, Any]:
    """Run the demo into ``out``; returns the report dict (also written as report.json)."""
    started = time.perf_counter()
    out.mkdir(parents=True, exist_ok=True)
    taxonomy = demo_taxonomy()
    records = generate_telemetry(seed=seed, n_sites=n_sites)
    write_telemetry_csv(records, out / "telemetry.csv")
    _say(quiet, f"invented {len(records)} URLs over {n_sites} sites -> telemetry.csv")
    keys = [normalize(r.url) for r in records]
    labels = [r.label for r in records]
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25, seed=seed)
    _say(quiet, f"split {split.method} at {split.cut}: {len(split.train)} train, "
               f"{len(split.test)} test (new domains only)")
    model = UrlModel(seed=seed).fit([keys[i] for i in split.train],
                                    [labels[i] for i in split.train], taxonomy=taxonomy)
    test_keys = [keys[i] for i in split.test]
    proba = model.predict_proba(test_keys)
    metrics = evaluate_proba(proba, [labels[i] for i in split.test], model.classes_,
                             counts=[records[i].count for i in split.test])
    metrics["split"] = split.describe()
    by_signal: dict[str, dict[str, float]] = {}
    pred = proba.argmax(axis=1)
    for signal in sorted({records[i].signal for i in split.test}):
        rows = [j for j, i in enumerate(split.test) if records[i].signal == signal]
        right = sum(model.classes_[pred[j]] == labels[split.test[j]] for j in rows)
        by_signal[signal] = {"rows": len(rows), "accuracy": round(right / len(rows), 4)}
    metrics["accuracy_by_url_signal"] = by_signal
    model.save(out / "model", metrics=metrics)
    _say(quiet, f"URL model trained in {model.training_['seconds']:.1f}s -> model/ "
               f"({model.version})")
    all_proba = model.predict_proba(keys)
    verdicts = url_verdicts([k.url for k in keys], all_proba, model.classes_, model.version)
    with open_writer(out / "verdicts.jsonl") as writer:
        for v in verdicts:
            writer.write(v.to_dict())
    needs = sum(v.needs_fetch for v in verdicts)
    fetch_report = _fetch_stage(records, verdicts, out, max_fetches, quiet)
    examples = [model.explain(keys[i], top=5, n_classes=1).to_dict() for i in split.test[:5]]
    headline = {
        "urls": len(records),
        "test_rows": len(split.test),
        "url_model_accuracy": metrics["accuracy"],
        "url_model_macro_f1": metrics["macro_f1"],
        "url_model_ece_15": metrics["ece_15"],
        "accuracy_weighted_by_lookups": metrics.get("weighted", {}).get("accuracy"),
        "share_marked_needs_fetch": round(needs / len(verdicts), 4),
        "fetched": fetch_report["fetched"],
        "fetch_outcomes": fetch_report["outcomes"],
        "seconds": round(time.perf_counter() - started, 1),
    }
    report = {"scenario": "Tallowmere Rail Cooperative (invented)", "seed": seed,
              "taxonomy": taxonomy.name, "model_version": model.version,
              "headline": headline, "metrics": metrics, "fetch": fetch_report,
              "explain_examples": examples}
    (out / "report.json").write_text(json.dumps(report, indent=2, ensure_ascii=False) + "\n",
                                     encoding="utf-8")
    (out / "summary.md").write_text(_summary_markdown(report), encoding="utf-8")
    _say(quiet, "wrote verdicts.jsonl, report.json, summary.md")
    return report


def _fetch_stage(records: list, verdicts: list, out: Path, max_fetches: int,
                 quiet: bool) -> dict[str, Any]:
    """Fetch the least confident URLs from the loopback site farm through the sandboxed
    fetcher (the farm plays every scenario site; the address guard's only hole is the
    farm's 127.0.0.1). The page-text stage that reads them comes in a later release."""
    import asyncio
    from collections import Counter

    from cascade.fetch import Fetcher, FetchPolicy
    from cascade.scenario.site_farm import SiteFarm

    order = sorted(range(len(verdicts)), key=lambda i: verdicts[i].confidence)
    chosen = [i for i in order if verdicts[i].needs_fetch][:max_fetches]
    outcomes: Counter[str] = Counter()
    with SiteFarm(records) as farm:
        policy = FetchPolicy(ports=(farm.port,), allow_networks=("127.0.0.1/32",),
                             per_host_delay_s=0.0, deadline_s=5.0)

        def local(url: str) -> str:
            key = normalize(url)
            return f"http://{key.host}:{farm.port}{key.path}" + (
                f"?{key.query}" if key.query else "")

        async def run() -> float:
            started = time.perf_counter()
            async with Fetcher(policy, farm.resolver()) as fetcher:
                with open_writer(out / "fetches.jsonl") as writer:
                    async for result in fetcher.fetch_many(
                            [local(verdicts[i].url) for i in chosen]):
                        outcomes[str(result.outcome)] += 1
                        row = result.to_dict(with_text=False)
                        row["text_chars"] = len(result.text or "")
                        writer.write(row)
            return time.perf_counter() - started

        seconds = asyncio.run(run())
    _say(quiet, f"fetched the {len(chosen)} least confident URLs from the loopback site farm "
               f"in {seconds:.1f}s -> fetches.jsonl")
    return {"fetched": len(chosen), "outcomes": dict(outcomes),
            "pages_per_s": round(len(chosen) / seconds, 1) if seconds else None}


def _summary_markdown(report: dict[str, Any]) -> str:
    h = report["headline"]
    m = report["metrics"]
    lines = [
        "# cascade demo: URL-model stage",
        "",
        f"Scenario: {report['scenario']}, seed {report['seed']}; model {report['model_version']}.",
        "",
        "| figure | value |",
        "| --- | --- |",
        f"| URLs in the invented log | {h['urls']} |",
        f"| held-out URLs (new domains after the time cut) | {h['test_rows']} |",
        f"| accuracy | {h['url_model_accuracy']:.4f} |",
        f"| macro-F1 | {h['url_model_macro_f1']:.4f} |",
        f"| expected calibration error (15 bins) | {h['url_model_ece_15']:.4f} |",
        f"| accuracy weighted by lookups | {h['accuracy_weighted_by_lookups'] or 0:.4f} |",
        f"| share of URLs the URL model is unsure of (< 0.8) | {h['share_marked_needs_fetch']} |",
        f"| least confident URLs fetched from the loopback farm | {h['fetched']} |",
        f"| fetch outcomes | {h['fetch_outcomes']} |",
        "",
        "## Accuracy by what the URL string says",
        "",
        "| URL signal | rows | accuracy |",
        "| --- | --- | --- |",
    ]
    for signal, row in m["accuracy_by_url_signal"].items():
        lines.append(f"| {signal} | {row['rows']} | {row['accuracy']:.4f} |")
    lines += ["", "Opaque names and shared hosts are where the URL says nothing: those are the",
              "lookups a page fetch is for. Categories are probabilities; the policy owner",
              "decides what to block.", ""]
    return "\n".join(lines)
