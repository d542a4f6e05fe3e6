"""The run-time budget meter: what is actually spent never exceeds the budget, against a
real HTTP server on loopback (the scenario's site farm) and a scripted fetcher."""

from __future__ import annotations

import asyncio
from dataclasses import dataclass

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cascade.budget import Budget
from cascade.budget_meter import BudgetMeter, fetch_within_budget
from cascade.fetch import Fetcher, FetchPolicy
from cascade.scenario.site_farm import SiteFarm
from cascade.urls import normalize


@dataclass
class _Result:
    bytes_read: int
    elapsed_ms: float


class _ScriptedFetcher:
    """Returns fixed sizes and times after a short sleep (no network): the meter's logic."""

    def __init__(self, sizes: list[int], ms: list[float]) -> None:
        self.sizes, self.ms, self.calls = sizes, ms, 0

    async def fetch(self, url: str) -> _Result:
        i = int(url.rsplit("/", 1)[1])
        self.calls += 1
        await asyncio.sleep(0.001 * (i % 3))
        return _Result(self.sizes[i], self.ms[i])


async def _run(fetcher, urls, meter, window=8):
    return [row async for row in fetch_within_budget(fetcher, urls, meter, window=window)]


@settings(max_examples=40, deadline=None)
@given(sizes=st.lists(st.integers(0, 1000), min_size=0, max_size=40),
       count=st.integers(0, 50), max_bytes=st.integers(0, 6000),
       max_seconds=st.floats(0, 30), window=st.integers(1, 10))
def test_actual_spend_never_exceeds_any_limit(sizes, count, max_bytes, max_seconds,
                                              window) -> None:
    n = len(sizes)
    ms = [float((i * 37) % 2000) for i in range(n)]  # up to 2 s, the worst case below
    urls = [f"http://farm.test/{i}" for i in range(n)]
    budget = Budget(max_fetches=count, max_bytes=max_bytes, max_seconds=max_seconds)
    meter = BudgetMeter(budget, n, worst_bytes=1000, worst_seconds=2.0)
    fetcher = _ScriptedFetcher(sizes, ms)
    rows = asyncio.run(_run(fetcher, urls, meter, window))
    assert len(rows) == n and {u for u, _, _ in rows} == set(urls)
    fetched = [r for _, r, why in rows if why == "selected"]
    assert fetcher.calls == len(fetched) <= min(count, n)
    assert sum(r.bytes_read for r in fetched) == meter.bytes_spent <= max_bytes
    assert sum(r.elapsed_ms for r in fetched) / 1000 == pytest.approx(meter.seconds_spent)
    assert meter.seconds_spent <= max_seconds + 1e-9
    # Fetched ones come first in plan order; the rest are all left with the stopping limit.
    reasons = [why for _, _, why in rows if why != "selected"]
    assert len(set(reasons)) <= 1 and all(w.startswith("budget:") for w in reasons)


def test_small_pages_leave_room_for_more_fetches_than_the_worst_case() -> None:
    # Budget of 2.5 worst cases, pages of a tenth of one: room frees up as fetches end.
    sizes = [100] * 30
    meter = BudgetMeter(Budget(max_bytes=2500), 30, worst_bytes=1000, worst_seconds=1.0)
    rows = asyncio.run(_run(_ScriptedFetcher(sizes, [1.0] * 30),
                            [f"http://farm.test/{i}" for i in range(30)], meter))
    fetched = sum(why == "selected" for _, _, why in rows)
    assert fetched > 2 and meter.bytes_spent <= 2500
    assert rows[-1][2] == "budget:bytes"


def test_meter_against_the_loopback_site_farm(scenario) -> None:
    records = scenario.records[:40]
    with SiteFarm(records) as farm:
        policy = FetchPolicy(ports=(farm.port,), allow_networks=("127.0.0.1/32",),
                             per_host_delay_s=0.0, deadline_s=3.0, max_bytes=64 << 10)
        urls = [farm.url(normalize(r.url).host, normalize(r.url).path) for r in records]
        budget = Budget(max_fetches=25, max_bytes=200 << 10)
        meter = BudgetMeter.for_policy(budget, len(urls), policy)

        async def go():
            async with Fetcher(policy, farm.resolver()) as fetcher:
                return await _run(fetcher, urls, meter, window=4)

        rows = asyncio.run(go())
    fetched = [r for _, r, why in rows if why == "selected"]
    assert 0 < len(fetched) <= 25
    assert sum(r.bytes_read for r in fetched) <= 200 << 10  # what was really read
    assert all(r.ok for r in fetched)
    assert len(rows) == len(urls)
