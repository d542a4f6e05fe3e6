"""Spending a fetch budget at run time, so that the actual spend never exceeds it.

The planner (``cascade.budget.plan``) chooses with *expected* bytes and seconds; real fetches
vary. The meter closes that gap: a fetch may start only if its worst case (the fetcher's
own caps: ``FetchPolicy.max_bytes`` off the wire, ``FetchPolicy.deadline_s`` of time) fits in
what is left, counting the worst case of the fetches still in flight. When a fetch ends its
reservation is replaced by what it really used. So the count, byte and seconds limits hold
for what was actually spent, whatever the pages do. Bytes are page bytes as the fetcher
reports them (``FetchResult.bytes_read``); seconds are summed fetch time
(``FetchResult.elapsed_ms``), not wall time.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass
from typing import Any

from cascade.budget import Budget
from cascade.verdict import Reason

__all__ = ["BudgetMeter", "Reservation", "fetch_within_budget"]


@dataclass(frozen=True)
class Reservation:
    """The worst case held back for one fetch in flight."""

    bytes: float
    seconds: float


class BudgetMeter:
    """Tracks what a run has spent against a ``Budget``.

    ``n_offered`` is how many URLs the budget's share refers to; ``worst_bytes`` and
    ``worst_seconds`` bound one fetch (take them from the fetcher's ``FetchPolicy``).
    """

    def __init__(self, budget: Budget, n_offered: int, worst_bytes: float,
                 worst_seconds: float) -> None:
        if worst_bytes < 0 or worst_seconds < 0:
            raise ValueError("worst_bytes and worst_seconds must be >= 0")
        self.budget = budget
        self.count_limit = budget.count_limit(n_offered)
        self.worst_bytes = float(worst_bytes)
        self.worst_seconds = float(worst_seconds)
        self.started = 0
        self.bytes_spent = 0.0
        self.seconds_spent = 0.0
        self._held_bytes = 0.0
        self._held_seconds = 0.0

    @classmethod
    def for_policy(cls, budget: Budget, n_offered: int, policy: Any) -> BudgetMeter:
        """A meter whose worst case per fetch is ``policy``'s byte cap and deadline."""
        return cls(budget, n_offered, float(policy.max_bytes), float(policy.deadline_s))

    def why_not(self) -> Reason | None:
        """Which limit stops one more fetch from starting now; None if it may start."""
        b = self.budget
        if self.started >= self.count_limit:
            return Reason.BUDGET_COUNT
        if b.max_bytes is not None and \
                self.bytes_spent + self._held_bytes + self.worst_bytes > b.max_bytes:
            return Reason.BUDGET_BYTES
        if b.max_seconds is not None and \
                self.seconds_spent + self._held_seconds + self.worst_seconds > b.max_seconds:
            return Reason.BUDGET_SECONDS
        return None

    def try_start(self) -> Reservation | None:
        """Reserve one fetch's worst case, or None if that would overrun a limit."""
        if self.why_not() is not None:
            return None
        self.started += 1
        self._held_bytes += self.worst_bytes
        self._held_seconds += self.worst_seconds
        return Reservation(self.worst_bytes, self.worst_seconds)

    def finish(self, reservation: Reservation, bytes_read: float, seconds: float) -> None:
        """Replace a reservation by what the fetch used (never more than its worst case)."""
        self._held_bytes -= reservation.bytes
        self._held_seconds -= reservation.seconds
        self.bytes_spent += min(max(float(bytes_read), 0.0), reservation.bytes)
        self.seconds_spent += min(max(float(seconds), 0.0), reservation.seconds)

    def spent(self) -> dict[str, float]:
        return {"fetches": self.started, "bytes": round(self.bytes_spent),
                "seconds": round(self.seconds_spent, 3)}


async def fetch_within_budget(fetcher: Any, urls: Sequence[str], meter: BudgetMeter,
                              window: int = 64) -> AsyncIterator[tuple[str, Any, str]]:
    """Fetch ``urls`` in the given (plan) order while the meter allows; yields
    ``(url, FetchResult or None, reason)``. A URL never started has the limit that stopped
    it (``budget:count``, ``budget:bytes``, ``budget:seconds``); a started one has
    ``selected``."""
    pending = list(urls)
    running: dict[asyncio.Task[Any], tuple[str, Reservation]] = {}
    pos = 0
    stop: Reason | None = None
    try:
        while pos < len(pending) or running:
            while pos < len(pending) and len(running) < window and stop is None:
                reservation = meter.try_start()
                if reservation is None:
                    if not running:  # nothing will free room: the budget is spent
                        stop = meter.why_not() or Reason.BUDGET_COUNT
                    break
                url = pending[pos]
                pos += 1
                running[asyncio.ensure_future(fetcher.fetch(url))] = (url, reservation)
            if not running:
                break
            done, _ = await asyncio.wait(running, return_when=asyncio.FIRST_COMPLETED)
            for task in done:
                url, reservation = running.pop(task)
                result = task.result()
                meter.finish(reservation, result.bytes_read or 0, result.elapsed_ms / 1000.0)
                yield url, result, Reason.SELECTED
        reason = stop or meter.why_not() or Reason.BUDGET_COUNT
        for url in pending[pos:]:
            yield url, None, reason
    finally:
        for task in running:
            task.cancel()
