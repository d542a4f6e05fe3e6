"""The nightly job: the day's lookup log in, refined verdicts out to the store.

Stream the log (any input format, ``.gz``; a URL with a count or one line per lookup),
normalize and add up lookups per URL, skip URLs whose verdict in the store is still fresh,
score the rest with the URL model, plan fetches within the budget (with yesterday's fetch
costs and domain history from the store), fetch the plan through the sandboxed fetcher and
the budget meter (so the real spend never passes the budget), fuse, and write verdicts to
the store; then write the night's changes, an analyst review queue and a report.

Crash safety: every step's result is checkpointed in the store (the plan once, then each
batch of verdicts, fetch results and "done" marks in one transaction). Killed at any point
and started again with the same arguments (so the same run id), the job resumes: verdicts
already written stay, URLs already fetched are not fetched again, nothing is written twice.
"""

from __future__ import annotations

import asyncio
import hashlib
import json
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from cascade.budget import Budget, FetchCosts, plan
from cascade.bundle import ModelBundle
from cascade.errors import CascadeError, InputFormatError, InvalidURL
from cascade.fetch_value import DomainHistory
from cascade.io import Progress, ReadStats, open_writer, read_records
from cascade.store import VerdictStore
from cascade.urls import UrlKey, normalize
from cascade.verdict import Stage, Verdict

__all__ = ["NightOptions", "NightResult", "night_run_id", "read_log", "run_night"]

_SCORE_CHUNK = 20_000


@dataclass(frozen=True)
class NightOptions:
    """What a night may spend and how it writes. ``write_every`` fetch results go to the
    store in one transaction (the most a crash can make the resumed job fetch again)."""

    budget: Budget = Budget(max_fraction=0.1)
    fetch_below: float = 0.8
    top_k: int = 3
    write_every: int = 25
    review_size: int = 500
    use_history: bool = True
    skip_fresh: bool = True
    use_refine_queue: bool = True  # also decide what the service queued (store.refine_queue)
    progress: bool | None = None  # None: a bar on a terminal, plain lines otherwise
    # re-estimate the class mix of the night's URLs and adjust the URL model's
    # probabilities to it before planning (cascade.prior_shift; docs/night.md)
    prior_shift: bool = False
    # the log's own name for its URL column (or JSON key) and its CSV separator
    # (cascade.io.read_records); None: 'url', and the format's own separator
    url_column: str | None = None
    delimiter: str | None = None


@dataclass
class NightResult:
    run_id: str
    report: dict[str, Any]
    paths: dict[str, Path] = field(default_factory=dict)
    resumed: bool = False


@dataclass
class _LogEntry:
    key: UrlKey
    count: int
    from_queue: bool = False


def _bad_kind(reason: str) -> str:
    """A short kind for a bad line's reason (for the counts by kind)."""
    text = reason.lower()
    for kind in ("invalid url", "utf-8", "too long", "json", "column", "count", "no url"):
        if kind in text:
            return kind.replace(" ", "-")
    return text.split(":", 1)[0][:40] or "other"


def read_log(path: str | Path, stats: ReadStats, fmt: str | None = None,
             say: Callable[[str], None] | None = None,
             progress: bool | None = None, url_column: str | None = None,
             delimiter: str | None = None) -> dict[str, _LogEntry]:
    """Normalized URL -> its key and summed lookups, streaming the log; bad lines and bad
    URLs are counted in ``stats`` (samples kept) and skipped. ``progress`` as
    ``NightOptions.progress`` (None: a bar on a terminal only)."""
    entries: dict[str, _LogEntry] = {}
    bar = Progress(label="reading log", enabled=progress)
    columns = {"url": url_column} if url_column else None
    for rec in read_records(path, fmt=fmt, stats=stats, columns=columns, delimiter=delimiter):
        try:
            key = normalize(rec.url)
        except InvalidURL as exc:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, f"invalid URL: {exc.reason}")
            continue
        entry = entries.get(key.url)
        if entry is None:
            entries[key.url] = _LogEntry(key, rec.count)
        else:
            entry.count += rec.count
        bar.update()
    bar.close()
    return entries


def night_run_id(log: str | Path, bundle: ModelBundle, budget: Budget,
                 prior_shift: bool = False) -> str:
    """A run id that the same command gives again: the log's size and head, the model and
    the budget (and ``prior_shift`` when on: other probabilities, another night). Starting
    the same night again resumes it."""
    path = Path(log)
    digest = hashlib.sha256()
    digest.update(str(path.stat().st_size).encode())
    with path.open("rb") as fh:
        digest.update(fh.read(1 << 20))
    digest.update(bundle.version.encode())
    digest.update(json.dumps(budget.describe(), sort_keys=True).encode())
    if prior_shift:
        digest.update(b"prior-shift")
    stamp = time.strftime("%Y%m%d", time.gmtime(path.stat().st_mtime))
    return f"{stamp}-{digest.hexdigest()[:12]}"


def _history(store: VerdictStore, classes: Sequence[str]) -> DomainHistory:
    domains, cats = store.domain_categories()
    index = {c: i for i, c in enumerate(classes)}
    pairs = [(d, index[c]) for d, c in zip(domains, cats, strict=True) if c in index]
    return DomainHistory.from_rows([d for d, _ in pairs], [c for _, c in pairs])


def run_night(
    bundle: ModelBundle,
    store: VerdictStore,
    log: str | Path,
    out_dir: str | Path,
    *,
    options: NightOptions | None = None,
    fetcher_factory: Callable[[], Any] | None = None,
    fetch_target: Callable[[str], str] | None = None,
    run_id: str | None = None,
    log_format: str | None = None,
    say: Callable[[str], None] | None = None,
    engine: str = "local",
    dask_client: Any = None,
) -> NightResult:
    """Run (or resume) one night; returns its report (also written under ``out_dir``).

    ``fetcher_factory`` makes the ``Fetcher`` (its policy and resolver decide what may be
    reached); ``fetch_target`` maps a URL to what is fetched (the demo's loopback site
    farm); ``engine="dask"`` fetches on a Dask cluster (``dask_client``), partitioned by
    registered domain, verdicts merged into the store here."""
    opts = options or NightOptions()
    tell = say or (lambda _m: None)
    if engine not in ("local", "dask"):
        raise ValueError(f"engine must be 'local' or 'dask', not {engine!r}")
    own_client = None
    if engine == "dask" and dask_client is None:
        from cascade.batch_dask import local_client

        dask_client = own_client = local_client()
    try:
        return _run_night(bundle, store, log, out_dir, opts, fetcher_factory, fetch_target,
                          run_id, log_format, tell, engine, dask_client)
    finally:
        if own_client is not None:
            cluster = own_client.cluster
            own_client.close()
            cluster.close()


def _run_night(bundle: ModelBundle, store: VerdictStore, log: str | Path, out_dir: str | Path,
               opts: NightOptions, fetcher_factory: Callable[[], Any] | None,
               fetch_target: Callable[[str], str] | None, run_id: str | None,
               log_format: str | None, tell: Callable[[str], None], engine: str,
               dask_client: Any) -> NightResult:
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    log = Path(log)
    if not log.is_file():
        raise InputFormatError(f"{log}: no such log file")
    run_id = run_id or night_run_id(log, bundle, opts.budget, prior_shift=opts.prior_shift)
    existing = store.run(run_id)
    resumed = existing is not None
    if existing is not None and existing["state"] == "done":
        tell(f"run {run_id} is already done; writing its outputs again")
    started = time.perf_counter()
    stats = ReadStats()
    entries = read_log(log, stats, fmt=log_format, say=tell, progress=opts.progress,
                       url_column=opts.url_column, delimiter=opts.delimiter)
    tell(f"log: {stats.lines} lines, {len(entries)} distinct URLs, {stats.bad} bad lines")
    queued = _add_queued(store, entries) if opts.use_refine_queue else []
    if queued:
        tell(f"refine queue: {len(queued)} URLs the service flagged, not in the log")
    urls = list(entries)
    lookups = {u: e.count for u, e in entries.items()}
    store.start_run(run_id, {"log": str(log), "budget": opts.budget.describe(),
                             "model": bundle.version, "fetch_below": opts.fetch_below,
                             **({"prior_shift": True} if opts.prior_shift else {})})
    # ---- what to work on: not fresh in the store (a resumed run keeps its plan)
    planned_items = store.plan_items(run_id)
    before = store.get_many(urls)
    if planned_items:
        work = [it["url"] for it in planned_items if it["url"] in entries]
    else:
        fresh = store.fresh(urls) if opts.skip_fresh else set()
        work = [u for u in urls if u not in fresh]
    keys = [entries[u].key for u in work]
    tell(f"{len(work)} URLs to decide ({len(urls) - len(work)} fresh in the store)")
    if engine == "dask":
        from cascade.batch_dask import score_on_cluster

        proba = score_on_cluster(bundle.url_model, [k.url for k in keys], dask_client)
    else:
        proba = _score(bundle, keys)
    shift = None
    if opts.prior_shift:
        proba, shift = _shift_priors(bundle, proba, tell)
    domains = [k.registered_domain or k.host for k in keys]
    history = _history(store, bundle.classes) if opts.use_history else None
    costs = FetchCosts.from_history(store.fetch_history()) if opts.use_history and \
        store.counts()["fetches"] else None
    gain = bundle.expected_gain(proba, domains, history, urls=keys) if len(keys) else {
        "gain": np.zeros(0), "p_wrong": np.zeros(0)}
    if not planned_items:
        night_plan = plan([k.url for k in keys], proba if len(keys) else np.zeros((0, 1)),
                          bundle.value_model, opts.budget,
                          counts=[lookups[u] for u in work], domains=domains,
                          fetch_costs=costs, history=history,
                          costs=bundle.taxonomy.costs(bundle.classes))
        store.save_plan(run_id, ((it.url, lookups[it.url], it.fetch, it.rank, it.reason)
                                 for it in night_plan.items))
        planned_items = store.plan_items(run_id)
        tell(f"plan: {night_plan.totals['fetches']} fetches within {opts.budget.describe()}")
    reasons = {it["url"]: it["reason"] for it in planned_items}
    done = {it["url"] for it in planned_items if it["done"]}
    row_of = {k.url: i for i, k in enumerate(keys)}
    # ---- URL-stage verdicts for everything the plan does not fetch
    not_fetched = [it["url"] for it in planned_items if not it["fetch"] and
                   it["url"] not in done]
    for start in range(0, len(not_fetched), 5000):
        part = not_fetched[start:start + 5000]
        rows = [row_of[u] for u in part]
        verdicts = bundle.verdicts([keys[r] for r in rows], url_proba=proba[rows],
                                   plan={u: reasons[u] for u in part},
                                   fetch_below=opts.fetch_below, top_k=opts.top_k)
        _commit(store, run_id, verdicts, {}, domains, row_of, part)
    # ---- fetch the plan (what is not done yet), within what the budget has left
    to_fetch = [it["url"] for it in planned_items if it["fetch"] and it["url"] not in done]
    spent_before = _spent(store, run_id)
    if to_fetch:
        tell(f"fetching {len(to_fetch)} planned URLs "
             f"({len([1 for it in planned_items if it['fetch']]) - len(to_fetch)} done before)")
        fetch = _fetch_local if engine == "local" else _fetch_dask
        fetch(bundle, store, run_id, to_fetch, keys, proba, row_of, domains, reasons, opts,
              fetcher_factory, fetch_target, spent_before, len(work), dask_client, tell)
    # ---- outputs
    report = _report(bundle, store, run_id, entries, work, before, proba, gain, row_of,
                     stats, opts, time.perf_counter() - started)
    if shift is not None:
        report["prior_shift"] = shift
    paths = _write_outputs(bundle, store, run_id, out, report, keys, proba, gain, row_of,
                           lookups, opts)
    store.set_run_state(run_id, "done", report)
    if opts.use_refine_queue:  # decided tonight: the service queues them again if need be
        store.dequeue_refine(work)
    return NightResult(run_id, report, paths, resumed)


def _add_queued(store: VerdictStore, entries: dict[str, _LogEntry]) -> list[str]:
    """Add the refine queue's URLs that the log does not have (with the lookups the
    service counted); a URL in both keeps the log's count, which already holds them."""
    added = []
    for url, count in store.refine_queue():
        if url in entries:
            continue
        try:
            key = normalize(url)
        except InvalidURL:
            continue
        if key.url not in entries:
            entries[key.url] = _LogEntry(key, count, from_queue=True)
            added.append(key.url)
    return added


def _shift_priors(bundle: ModelBundle, proba: np.ndarray, tell: Callable[[str], None]
                  ) -> tuple[np.ndarray, dict[str, Any]]:
    """The night's URL probabilities adjusted to its estimated class mix, and the summary
    for the report; a model without class counts (or unusable rows) keeps them as they
    are, with the reason in the summary: the night goes on."""
    from cascade.prior_shift import adjust_to_batch

    try:
        adjusted, summary = adjust_to_batch(proba, bundle.url_model)
    except CascadeError as exc:
        tell(f"prior shift not applied: {exc}")
        return proba, {"applied": False, "note": str(exc)}
    tell(f"prior shift: {summary['note']}")
    return adjusted, summary


def _score(bundle: ModelBundle, keys: Sequence[UrlKey]) -> np.ndarray:
    if not keys:
        return np.zeros((0, len(bundle.classes)))
    parts = [bundle.url_proba(keys[i:i + _SCORE_CHUNK])
             for i in range(0, len(keys), _SCORE_CHUNK)]
    return np.vstack(parts)


def _commit(store: VerdictStore, run_id: str, verdicts: Sequence[Verdict],
            fetches: Mapping[str, Any], domains: Sequence[str], row_of: Mapping[str, int],
            urls: Sequence[str], results: Sequence[Any] = (),
            targets: Mapping[str, str] | None = None) -> None:
    """One transaction: the verdicts, the fetch results and the done marks of a batch."""
    doms = {u: domains[row_of[u]] for u in urls}
    with store.batch() as conn:
        store._write_verdicts_in(conn, verdicts, run_id=run_id, fetches=fetches, domains=doms)
        if results:
            store._record_fetches_in(conn, results, run_id=run_id, domains=doms, urls=targets)
        store.mark_done(run_id, urls, conn)


def _spent(store: VerdictStore, run_id: str) -> dict[str, float]:
    row = store._conn.execute("SELECT COUNT(*), COALESCE(SUM(bytes_read), 0), "
                              "COALESCE(SUM(elapsed_ms), 0) FROM fetches WHERE run_id = ?",
                              (run_id,)).fetchone()
    return {"fetches": int(row[0]), "bytes": float(row[1]), "seconds": float(row[2]) / 1000}


def _meter(opts: NightOptions, n_offered: int, policy: Any, spent: Mapping[str, float]) -> Any:
    """The budget meter, charged with what this run already spent before a restart."""
    from cascade.budget_meter import BudgetMeter

    meter = BudgetMeter.for_policy(opts.budget, n_offered, policy)
    meter.started = int(spent["fetches"])
    meter.bytes_spent = float(spent["bytes"])
    meter.seconds_spent = float(spent["seconds"])
    return meter


def _fetch_local(bundle: ModelBundle, store: VerdictStore, run_id: str, to_fetch: list[str],
                 keys: Sequence[UrlKey], proba: np.ndarray, row_of: Mapping[str, int],
                 domains: Sequence[str], reasons: Mapping[str, str], opts: NightOptions,
                 fetcher_factory: Callable[[], Any] | None,
                 fetch_target: Callable[[str], str] | None, spent: Mapping[str, float],
                 n_offered: int, _client: Any, tell: Callable[[str], None]) -> None:
    from cascade.budget_meter import fetch_within_budget
    from cascade.fetch import Fetcher

    target_of = {u: (fetch_target(u) if fetch_target else u) for u in to_fetch}
    back = {t: u for u, t in target_of.items()}
    progress = Progress(label="fetching", total=len(to_fetch), enabled=opts.progress)

    async def go() -> None:
        fetcher = fetcher_factory() if fetcher_factory else Fetcher()
        meter = _meter(opts, n_offered, fetcher.policy, spent)
        pending: list[tuple[str, Any, str]] = []

        def flush() -> None:
            if not pending:
                return
            urls = [u for u, _, _ in pending]
            results = {u: r for u, r, _ in pending if r is not None}
            plan_reasons = {u: (reasons[u] if r is not None else why) for u, r, why in pending}
            rows = [row_of[u] for u in urls]
            verdicts = bundle.verdicts([keys[r] for r in rows], url_proba=proba[rows],
                                       fetches=results, plan=plan_reasons,
                                       fetch_below=opts.fetch_below, top_k=opts.top_k)
            _commit(store, run_id, verdicts, results, domains, row_of, urls,
                    [r for r in results.values()],
                    {r.url: u for u, r in results.items()})
            pending.clear()

        async with fetcher:
            async for target, result, why in fetch_within_budget(
                    fetcher, [target_of[u] for u in to_fetch], meter,
                    window=fetcher.policy.concurrency):
                pending.append((back[target], result, str(why)))
                progress.update()
                if len(pending) >= opts.write_every:
                    flush()
            flush()
        progress.close()

    asyncio.run(go())


def _fetch_dask(bundle: ModelBundle, store: VerdictStore, run_id: str, to_fetch: list[str],
                keys: Sequence[UrlKey], proba: np.ndarray, row_of: Mapping[str, int],
                domains: Sequence[str], reasons: Mapping[str, str], opts: NightOptions,
                fetcher_factory: Callable[[], Any] | None,
                fetch_target: Callable[[str], str] | None, spent: Mapping[str, float],
                n_offered: int, client: Any, tell: Callable[[str], None]) -> None:
    from cascade.batch_dask import fetch_on_cluster

    fetch_on_cluster(bundle, store, run_id, to_fetch, keys, proba, row_of, domains, reasons,
                     opts, fetcher_factory, fetch_target, spent, n_offered, client, tell,
                     _commit)


# ---------------------------------------------------------------------------- outputs
def _coverage(verdicts: Mapping[str, Any], lookups: Mapping[str, int], fetch_below: float
              ) -> dict[str, float]:
    """Share of lookup volume whose verdict is confident (at or above ``fetch_below``) or
    from a page or a label: what the filtering service can act on with some trust."""
    total = sum(lookups.values()) or 1
    covered = sum(n for u, n in lookups.items() if u in verdicts and (
        verdicts[u]["stage"] != "url" or verdicts[u]["confidence"] >= fetch_below))
    return {"lookups": total, "covered_lookups": covered,
            "share": round(covered / total, 4)}


def _report(bundle: ModelBundle, store: VerdictStore, run_id: str,
            entries: Mapping[str, _LogEntry], work: Sequence[str], before: Mapping[str, Any],
            proba: np.ndarray, gain: Mapping[str, np.ndarray], row_of: Mapping[str, int],
            stats: ReadStats, opts: NightOptions, seconds: float) -> dict[str, Any]:
    lookups = {u: e.count for u, e in entries.items()}
    now = store.get_many(list(entries))
    as_dict = {u: {"stage": str(s.verdict.stage), "confidence": s.verdict.confidence,
                   "category": s.verdict.category} for u, s in now.items()}
    before_d = {u: {"stage": str(s.verdict.stage), "confidence": s.verdict.confidence,
                    "category": s.verdict.category} for u, s in before.items()}
    fetch_rows = store._conn.execute("SELECT outcome, COUNT(*) FROM fetches WHERE run_id = ? "
                                     "GROUP BY outcome", (run_id,)).fetchall()
    spent = _spent(store, run_id)
    mix = Counter(v["category"] for u, v in as_dict.items())
    stage_mix = Counter(v["stage"] for v in as_dict.values())
    bad_kinds = Counter(_bad_kind(s.reason) for s in stats.samples)
    report: dict[str, Any] = {
        "run_id": run_id,
        "model_version": bundle.version,
        "input": {**stats.to_dict(), "distinct_urls": len(entries),
                  "bad_by_kind_in_samples": dict(bad_kinds)},
        "decided": len(work),
        "fresh_skipped": len(entries) - len(work),
        "from_refine_queue": sum(1 for e in entries.values() if e.from_queue),
        "budget": opts.budget.describe(),
        "spent": spent,
        "fetch_outcomes": {o: n for o, n in fetch_rows},
        "coverage_before": _coverage(before_d, lookups, opts.fetch_below),
        "coverage_after": _coverage(as_dict, lookups, opts.fetch_below),
        "stages": dict(stage_mix),
        "category_mix": dict(mix.most_common()),
        "seconds": round(seconds, 2),
    }
    previous = store.previous_run(run_id)
    if previous is not None:
        # tonight's log URLs that the previous night decided: its verdict against the one
        # the store holds after tonight (unchanged when tonight found it still fresh)
        old = store.run_history(previous["run_id"])
        common = [u for u in entries if u in old and u in as_dict]
        changed = sum(old[u]["category"] != as_dict[u]["category"] for u in common)
        shift = [as_dict[u]["confidence"] - old[u]["confidence"] for u in common]
        report["drift"] = {"previous_run": previous["run_id"], "common_urls": len(common),
                           "top_category_changed_share":
                               round(changed / len(common), 4) if common else None,
                           "mean_confidence_shift":
                               round(float(np.mean(shift)), 4) if shift else None}
    else:
        report["drift"] = {"previous_run": None, "note": "first night in this store"}
    return report


def _write_outputs(bundle: ModelBundle, store: VerdictStore, run_id: str, out: Path,
                   report: dict[str, Any], keys: Sequence[UrlKey], proba: np.ndarray,
                   gain: Mapping[str, np.ndarray], row_of: Mapping[str, int],
                   lookups: Mapping[str, int], opts: NightOptions) -> dict[str, Path]:
    paths = {"changes": out / "changes.jsonl", "review": out / "review-queue.jsonl",
             "report": out / "night-report.json", "summary": out / "night-summary.md"}
    with open_writer(paths["changes"]) as w:
        for url in store.run_history(run_id):
            stored = store.get(url)
            if stored is not None:
                w.write(stored.to_dict())
    # analysts: residual uncertain URLs, by lookups x expected cost of a wrong verdict
    costs = bundle.taxonomy.costs(bundle.classes)
    rows = []
    for url, i in row_of.items():
        stored = store.get(url)
        if stored is None or stored.verdict.stage != Stage.URL or not stored.verdict.needs_fetch:
            continue
        p = proba[i]
        expected_cost = float((1.0 - p.max()) * costs[int(p.argmax())]) if len(p) else 0.0
        rows.append((lookups.get(url, 1) * max(expected_cost, 1e-9), url, i))
    rows.sort(reverse=True)
    with open_writer(paths["review"]) as w:
        for priority, url, i in rows[: opts.review_size]:
            exp = bundle.url_model.explain(keys[i], top=5, n_classes=2)
            w.write({"url": url, "lookups": lookups.get(url, 1),
                     "priority": round(priority, 4),
                     "top": [[c.category, round(c.probability, 4)] for c in exp.classes],
                     "because": [{"feature": f.feature, "value": round(f.value, 3)}
                                 for f in exp.classes[0].contributions]})
    report["review_queue"] = min(len(rows), opts.review_size)
    paths["report"].write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    paths["summary"].write_text(_summary(report), encoding="utf-8")
    return paths


def _summary(r: Mapping[str, Any]) -> str:
    cb, ca = r["coverage_before"], r["coverage_after"]
    lines = [f"# Night {r['run_id']}", "",
             f"Model {r['model_version']}; {r['input']['lines']} log lines, "
             f"{r['input']['distinct_urls']} distinct URLs, {r['input']['bad']} bad lines.", "",
             "| figure | value |", "| --- | --- |",
             f"| URLs decided tonight | {r['decided']} (fresh in the store: "
             f"{r['fresh_skipped']}) |",
             f"| lookups with a trusted verdict, before | {cb['share']:.1%} |",
             f"| lookups with a trusted verdict, after | {ca['share']:.1%} |",
             f"| fetches spent | {r['spent']['fetches']} ({r['spent']['bytes'] / 1e6:.1f} MB, "
             f"{r['spent']['seconds']:.0f} fetch-seconds) |",
             f"| budget | {', '.join(f'{k} {v}' for k, v in r['budget'].items()) or 'none'} |",
             f"| review queue | {r.get('review_queue', 0)} URLs |", ""]
    if "prior_shift" in r:
        lines += _prior_shift_lines(r["prior_shift"])
    lines += ["## Fetch outcomes", "", "| outcome | fetches |", "| --- | --- |"]
    lines += [f"| {o} | {n} |" for o, n in sorted(r["fetch_outcomes"].items())]
    lines += ["", "## Drift against the previous night", ""]
    d = r["drift"]
    if d.get("previous_run"):
        changed = d["top_category_changed_share"]
        shift = d["mean_confidence_shift"]
        lines.append(f"Previous run {d['previous_run']}: {d['common_urls']} URLs decided in "
                     f"both; top category changed for "
                     f"{'n/a' if changed is None else f'{changed:.1%}'}; mean confidence "
                     f"shift {'n/a' if shift is None else f'{shift:+.3f}'}.")
    else:
        lines.append("First night in this store: nothing to compare with.")
    lines += ["", "Categories are probabilities; the policy owner decides what to block.", ""]
    return "\n".join(lines)


def _prior_shift_lines(shift: Mapping[str, Any]) -> list[str]:
    lines = ["## Class mix (prior shift)", "", shift.get("note", ""), ""]
    est, train = shift.get("estimated_priors"), shift.get("training_priors")
    if shift.get("applied") and est and train:
        lines += ["| category | training prior | tonight's estimate |", "| --- | --- | --- |"]
        lines += [f"| {c} | {train[c]:.3f} | {est[c]:.3f} |"
                  for c in sorted(est, key=lambda c: -est[c])]
        lines.append("")
    return lines
