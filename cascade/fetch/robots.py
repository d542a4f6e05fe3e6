"""robots.txt rules per origin (RFC 9309), parsed with protego, cached for a day.

RFC 9309 section 2.3.1: a 2xx answer is parsed; a 4xx answer (including 404) means no
rules; a 5xx answer or a network failure means "assume complete disallow". Rules are
matched by our user-agent product token.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass

from protego import Protego

__all__ = ["RobotsCache", "RobotsRules", "interpret"]


@dataclass(frozen=True)
class RobotsRules:
    kind: str  # "parsed", "allow-all" (4xx), "disallow-all" (5xx, unreachable)
    parser: Protego | None
    detail: str
    fetched_at: float

    def allows(self, url: str, agent: str) -> bool:
        if self.kind == "allow-all":
            return True
        if self.kind == "disallow-all" or self.parser is None:
            return False
        return bool(self.parser.can_fetch(url, agent))


# (status or None for a failure, body bytes, detail) for an origin's /robots.txt
RobotsLoader = Callable[[str], Awaitable[tuple[int | None, bytes, str]]]


class RobotsCache:
    """One ``RobotsRules`` per origin; concurrent lookups of an origin share one fetch."""

    def __init__(self, ttl_s: float, max_entries: int = 50_000,
                 failure_ttl_s: float = 300.0) -> None:
        self.ttl_s = ttl_s
        self.failure_ttl_s = failure_ttl_s  # an unreachable robots.txt is asked again sooner
        self.max_entries = max_entries
        self._rules: dict[str, RobotsRules] = {}
        self._pending: dict[str, asyncio.Future[RobotsRules]] = {}

    async def rules(self, origin: str, load: RobotsLoader) -> RobotsRules:
        cached = self._rules.get(origin)
        if cached is not None:
            ttl = self.failure_ttl_s if cached.kind == "disallow-all" else self.ttl_s
            if time.monotonic() - cached.fetched_at < ttl:
                return cached
        pending = self._pending.get(origin)
        if pending is not None:
            try:
                return await asyncio.shield(pending)
            except asyncio.CancelledError:
                task = asyncio.current_task()
                if task is not None and task.cancelling():
                    raise  # we were cancelled ourselves
                # the loading fetch was cancelled (its own deadline): robots.txt unreachable
                return RobotsRules("disallow-all", None, "robots.txt load was cut off",
                                   time.monotonic())
        future: asyncio.Future[RobotsRules] = asyncio.get_running_loop().create_future()
        self._pending[origin] = future
        try:
            status, body, detail = await load(origin)
            rules = interpret(status, body, detail)
            if len(self._rules) >= self.max_entries:
                self._rules.pop(next(iter(self._rules)))
            self._rules[origin] = rules
            future.set_result(rules)
            return rules
        except BaseException as exc:
            future.set_exception(exc)
            future.exception()  # mark retrieved: waiters re-raise it themselves
            raise
        finally:
            self._pending.pop(origin, None)


def interpret(status: int | None, body: bytes, detail: str) -> RobotsRules:
    now = time.monotonic()
    if status is None or status >= 500:
        return RobotsRules("disallow-all", None, f"robots.txt unreachable ({detail})", now)
    if 400 <= status < 500:
        return RobotsRules("allow-all", None, f"robots.txt status {status}: no rules", now)
    if 200 <= status < 300:
        text = body.decode("utf-8", errors="replace")
        return RobotsRules("parsed", Protego.parse(text), "robots.txt parsed", now)
    return RobotsRules("disallow-all", None, f"robots.txt status {status}", now)
