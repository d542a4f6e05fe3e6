"""The nightly job's fetch step on a Dask cluster (``--engine dask``; ``pip install -e
'.[dask]'``).

The planned URLs are partitioned by registered domain, so each domain is fetched by one
worker and the per-host concurrency and delay still hold; each partition gets its share of
what is left of the budget (the count it holds, and bytes and fetch-seconds in proportion),
so the parts can never spend more than the whole. Workers fetch through the same sandboxed
fetcher (made by ``fetcher_factory`` on the worker) and send the results back; the driver
fuses them with the bundle and writes them into the store, one transaction per partition, as
the local engine does. Point it at an existing cluster with ``--dask-scheduler
tcp://host:8786`` (or pass a ``distributed.Client``); without one a ``LocalCluster`` of
processes on this machine is started.
"""

from __future__ import annotations

import asyncio
from collections import defaultdict
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from cascade.budget import Budget

__all__ = ["fetch_on_cluster", "fetch_partition", "local_client", "partition_by_domain",
           "score_on_cluster"]


def partition_by_domain(urls: Sequence[str], domains: Mapping[str, str], parts: int
                        ) -> list[list[str]]:
    """Whole registered domains to each part, the largest domains first, each to the part
    that holds the fewest URLs so far (balanced, deterministic)."""
    by_domain: dict[str, list[str]] = defaultdict(list)
    for u in urls:
        by_domain[domains[u]].append(u)
    out: list[list[str]] = [[] for _ in range(max(1, parts))]
    for _domain, members in sorted(by_domain.items(), key=lambda kv: (-len(kv[1]), kv[0])):
        min(out, key=len).extend(members)
    return [p for p in out if p]


def fetch_partition(targets: list[str], budget: dict[str, Any],
                    fetcher_factory: Callable[[], Any] | None) -> list[dict[str, Any]]:
    """On a worker: fetch ``targets`` within ``budget`` (a share of the night's); returns
    each result as a dict (``None`` result: left out by the budget, with the reason)."""
    from cascade.budget_meter import BudgetMeter, fetch_within_budget
    from cascade.fetch import Fetcher

    share = Budget(max_fetches=budget.get("max_fetches"), max_bytes=budget.get("max_bytes"),
                   max_seconds=budget.get("max_seconds"))

    async def go() -> list[dict[str, Any]]:
        fetcher = fetcher_factory() if fetcher_factory else Fetcher()
        meter = BudgetMeter.for_policy(share, len(targets), fetcher.policy)
        out = []
        async with fetcher:
            async for target, result, why in fetch_within_budget(
                    fetcher, targets, meter, window=fetcher.policy.concurrency):
                out.append({"target": target, "reason": str(why),
                            "result": None if result is None else result})
        return out

    return asyncio.run(go())


def _score_part(url_model: Any, urls: list[str]) -> np.ndarray:
    return url_model.predict_proba(urls)


def score_on_cluster(url_model: Any, urls: Sequence[str], client: Any,
                     chunk: int = 20_000) -> np.ndarray:
    """The URL model's probabilities, computed on the workers in chunks (the model is sent
    to each worker once)."""
    if not urls:
        return np.zeros((0, len(url_model.classes_)))
    model = client.scatter(url_model, broadcast=True)
    parts = [list(urls[i:i + chunk]) for i in range(0, len(urls), chunk)]
    futures = [client.submit(_score_part, model, part, pure=False) for part in parts]
    return np.vstack(client.gather(futures))


def local_client(workers: int = 2) -> Any:
    """A ``distributed.Client`` on a new ``LocalCluster`` of ``workers`` processes."""
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - depends on the extra
        from cascade.errors import UsageError

        raise UsageError("--engine dask needs the dask extra: pip install -e '.[dask]'") \
            from exc
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    return Client(cluster)


def fetch_on_cluster(bundle: Any, store: Any, run_id: str, to_fetch: list[str],
                     keys: Sequence[Any], proba: np.ndarray, row_of: Mapping[str, int],
                     domains: Sequence[str], reasons: Mapping[str, str], opts: Any,
                     fetcher_factory: Callable[[], Any] | None,
                     fetch_target: Callable[[str], str] | None, spent: Mapping[str, float],
                     n_offered: int, client: Any, tell: Callable[[str], None],
                     commit: Callable[..., None]) -> None:
    """Fetch ``to_fetch`` on the cluster, partitioned by domain; commit as parts finish."""
    from distributed import as_completed

    workers = max(1, len(client.scheduler_info().get("workers", {})))
    dom = {u: domains[row_of[u]] for u in to_fetch}
    parts = partition_by_domain(to_fetch, dom, parts=workers * 4)
    budget = opts.budget
    left_count = budget.count_limit(n_offered) - int(spent["fetches"])
    left_bytes = None if budget.max_bytes is None else budget.max_bytes - spent["bytes"]
    left_secs = None if budget.max_seconds is None else \
        budget.max_seconds - spent["seconds"]
    total = sum(len(p) for p in parts) or 1
    futures = {}
    given = 0
    for part in parts:
        count = min(len(part), max(0, left_count - given))
        given += count
        share = {"max_fetches": count,
                 "max_bytes": None if left_bytes is None else
                 max(0, int(left_bytes * len(part) / total)),
                 "max_seconds": None if left_secs is None else
                 max(0.0, left_secs * len(part) / total)}
        targets = [fetch_target(u) if fetch_target else u for u in part]
        fut = client.submit(fetch_partition, targets, share, fetcher_factory, pure=False)
        futures[fut] = part
    tell(f"dask: {len(parts)} partitions by domain on {workers} workers")
    for fut in as_completed(list(futures)):
        part = futures[fut]
        back = {(fetch_target(u) if fetch_target else u): u for u in part}
        rows = fut.result()
        results = {back[r["target"]]: r["result"] for r in rows if r["result"] is not None}
        plan_reasons = {back[r["target"]]: (reasons[back[r["target"]]]
                                            if r["result"] is not None else r["reason"])
                        for r in rows}
        urls = [back[r["target"]] for r in rows]
        idx = [row_of[u] for u in urls]
        verdicts = bundle.verdicts([keys[i] for i in idx], url_proba=proba[idx],
                                   fetches=results, plan=plan_reasons,
                                   fetch_below=opts.fetch_below, top_k=opts.top_k)
        commit(store, run_id, verdicts, results, domains, row_of, urls,
               list(results.values()), {r.url: u for u, r in results.items()})
