"""robots.txt rules per origin (RFC 9309), parsed with protego, cached within bounds.

RFC 9309 section 2.3.1: a 2xx answer is parsed; a 4xx answer (including 404) means no
rules; a 5xx answer or a network failure means "assume complete disallow". Rules are
matched by our user-agent product token.

A hostile robots.txt must not stall the fetcher: the body is read within its own caps (the
first ``robots_max_bytes`` of it, RFC 9309 section 2.5, the rest ignored); parsing runs in a
worker thread of its own under a time limit, so the event loop keeps serving every other
fetch; the cache is bounded by the estimated memory of the parsed rules, not by a count of
origins. Only answers are cached: a load that timed out or broke off (which may be our own
load, not the site's fault) is asked again next time; a 5xx is kept only briefly.
"""

from __future__ import annotations

import asyncio
import time
from collections import OrderedDict
from collections.abc import Awaitable, Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

from protego import Protego

__all__ = ["MAX_RULES_PER_GROUP", "RobotsCache", "RobotsRules", "compact_rules",
           "compact_rules_async", "interpret", "parse_rules"]

#: Estimated bytes of memory per byte of parsed robots.txt text (protego's objects),
#: measured on a 500 KiB file of Disallow lines (about 15x), rounded up.
_MEMORY_PER_TEXT_BYTE = 16
#: Rule sets up to this estimated size (about 4 KiB of text) are matched on the caller's
#: thread; larger ones in the worker threads.
_INLINE_MATCH_SIZE = 256 + _MEMORY_PER_TEXT_BYTE * 4096


@dataclass(frozen=True)
class RobotsRules:
    kind: str  # "parsed", "allow-all" (4xx), "disallow-all" (5xx, unreachable)
    parser: Protego | None
    detail: str
    fetched_at: float
    cache: str = "keep"  # "keep" (the TTL), "brief" (the failure TTL) or "never"
    size: int = field(default=256)  # estimated memory, for the cache's byte bound

    def allows(self, url: str, agent: str) -> bool:
        if self.kind == "allow-all":
            return True
        if self.kind == "disallow-all" or self.parser is None:
            return False
        return bool(self.parser.can_fetch(url, agent))


# (status or None for a failure, body bytes, detail) for an origin's /robots.txt
RobotsLoader = Callable[[str], Awaitable[tuple[int | None, bytes, str]]]


#: Distinct allow/disallow rules one group may hold; a file with more is treated as
#: "disallow all" (the careful reading) rather than matched rule by rule on every fetch.
MAX_RULES_PER_GROUP = 5_000


class TooManyRules(Exception):  # noqa: N818 - internal signal, mapped to disallow-all
    pass


class _Compactor:
    """``compact_rules``'s state, so the work can be done a slice of lines at a time."""

    def __init__(self, max_rules: int) -> None:
        self.max_rules = max_rules
        self.out: list[str] = []
        self.seen: set[str] = set()
        self.in_rules = False

    def feed(self, lines: list[str]) -> None:
        out, seen = self.out, self.seen
        for raw in lines:
            line = raw.split("#", 1)[0].strip()
            if not line:
                continue
            if line[:10].lower() == "user-agent":
                if self.in_rules:  # a new group starts
                    seen = self.seen = set()
                    self.in_rules = False
                out.append(line)
                continue
            self.in_rules = True
            if line in seen:
                continue
            seen.add(line)
            if len(seen) > self.max_rules:
                raise TooManyRules(f"robots.txt has over {self.max_rules} distinct rules in "
                                   "one group: treated as disallow-all")
            out.append(line)

    def text(self) -> str:
        return "\n".join(self.out)


def compact_rules(text: str, max_rules: int = MAX_RULES_PER_GROUP) -> str:
    """``text`` with repeated rule lines dropped within each group (RFC 9309 section 2.2:
    a repeated rule adds nothing to its group), so a file of one line repeated 30,000
    times parses and matches as one rule. Raises ``TooManyRules`` past ``max_rules``
    distinct rules in one group. Comments and blank lines are dropped too."""
    work = _Compactor(max_rules)
    work.feed(text.splitlines())
    return work.text()


async def compact_rules_async(text: str, max_rules: int = MAX_RULES_PER_GROUP,
                              slice_lines: int = 2048) -> str:
    """``compact_rules`` on the event loop, letting other tasks run between slices of
    ``slice_lines`` lines (about a millisecond each). Not in a thread: CPU-bound Python in
    a thread makes every socket call of the event loop wait for the interpreter lock."""
    work = _Compactor(max_rules)
    lines = text.splitlines()
    for start in range(0, len(lines), slice_lines):
        work.feed(lines[start:start + slice_lines])
        if start + slice_lines < len(lines):
            await asyncio.sleep(0)
    return work.text()


def parse_rules(body: bytes) -> tuple[Protego, int]:
    """Parse robots.txt bytes (UTF-8, RFC 9309 section 2.3; bad bytes replaced), after
    ``compact_rules``; returns the parser and the length of the text it holds."""
    text = compact_rules(body.decode("utf-8", errors="replace"))
    return Protego.parse(text), len(text)


class RobotsCache:
    """One ``RobotsRules`` per origin; concurrent lookups of an origin share one load.

    ``max_bytes`` bounds the estimated memory of everything cached (least recently used
    first out); ``parse_timeout_s`` bounds one parse, which runs in this cache's own worker
    threads (``parse_workers``), never on the event loop.
    """

    def __init__(self, ttl_s: float, max_bytes: int = 64 << 20,
                 failure_ttl_s: float = 60.0, parse_timeout_s: float = 2.0,
                 parse_workers: int = 2) -> None:
        self.ttl_s = ttl_s
        self.failure_ttl_s = failure_ttl_s
        self.max_bytes = max_bytes
        self.parse_timeout_s = parse_timeout_s
        self._rules: OrderedDict[str, RobotsRules] = OrderedDict()
        self._bytes = 0
        self._pending: dict[str, asyncio.Future[RobotsRules]] = {}
        self._parse_workers = parse_workers
        self._executor: ThreadPoolExecutor | None = None

    @property
    def cached_bytes(self) -> int:
        """Estimated memory held by the cached rules."""
        return self._bytes

    def __len__(self) -> int:
        return len(self._rules)

    def close(self) -> None:
        """Stop the parse threads (a parse still running finishes on its own)."""
        if self._executor is not None:
            self._executor.shutdown(wait=False, cancel_futures=True)
            self._executor = None

    def _fresh(self, origin: str) -> RobotsRules | None:
        cached = self._rules.get(origin)
        if cached is None:
            return None
        ttl = self.failure_ttl_s if cached.cache == "brief" else self.ttl_s
        if time.monotonic() - cached.fetched_at < ttl:
            self._rules.move_to_end(origin)
            return cached
        self._drop(origin)
        return None

    def _drop(self, origin: str) -> None:
        old = self._rules.pop(origin, None)
        if old is not None:
            self._bytes -= old.size

    def _store(self, origin: str, rules: RobotsRules) -> None:
        if rules.cache == "never" or rules.size > self.max_bytes:
            return
        self._drop(origin)
        self._rules[origin] = rules
        self._bytes += rules.size
        while self._bytes > self.max_bytes and self._rules:
            _, old = self._rules.popitem(last=False)
            self._bytes -= old.size

    async def _parse(self, text: str) -> Protego:
        """Protego's parse of compacted rules, in a worker thread under the time limit
        (at most ``MAX_RULES_PER_GROUP`` rules per group: tens of milliseconds)."""
        if self._executor is None:
            self._executor = ThreadPoolExecutor(self._parse_workers,
                                                thread_name_prefix="cascade-robots")
        loop = asyncio.get_running_loop()
        return await asyncio.wait_for(loop.run_in_executor(self._executor, Protego.parse,
                                                           text), self.parse_timeout_s)

    async def allows(self, rules: RobotsRules, url: str, agent: str) -> tuple[bool, str]:
        """Whether ``rules`` let ``agent`` fetch ``url``, and why. Matching costs time in
        proportion to the number of rules (a large file has tens of thousands), so a
        large rule set is matched in the worker threads, under the parse time limit."""
        if rules.parser is None or rules.size <= _INLINE_MATCH_SIZE:
            return rules.allows(url, agent), rules.detail
        if self._executor is None:
            self._executor = ThreadPoolExecutor(self._parse_workers,
                                                thread_name_prefix="cascade-robots")
        loop = asyncio.get_running_loop()
        try:
            allowed = await asyncio.wait_for(
                loop.run_in_executor(self._executor, rules.allows, url, agent),
                self.parse_timeout_s)
        except TimeoutError:
            return False, f"robots.txt rules took over {self.parse_timeout_s} s to match"
        return allowed, rules.detail

    async def interpret(self, status: int | None, body: bytes, detail: str) -> RobotsRules:
        """``interpret``, with the parse off the event loop and under its time limit."""
        if status is None or not 200 <= status < 300:
            return interpret(status, body, detail)
        now = time.monotonic()
        try:
            text = await compact_rules_async(body.decode("utf-8", errors="replace"))
            parser = await self._parse(text)
            kept = len(text)
        except TimeoutError:
            return RobotsRules("disallow-all", None,
                               f"robots.txt parse took over {self.parse_timeout_s} s",
                               now, cache="never")
        except TooManyRules as exc:
            return RobotsRules("disallow-all", None, str(exc), now)
        return RobotsRules("parsed", parser, "robots.txt parsed", now,
                           size=256 + _MEMORY_PER_TEXT_BYTE * kept)

    async def rules(self, origin: str, load: RobotsLoader) -> RobotsRules:
        cached = self._fresh(origin)
        if cached is not None:
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
                                   time.monotonic(), cache="never")
        future: asyncio.Future[RobotsRules] = asyncio.get_running_loop().create_future()
        self._pending[origin] = future
        try:
            status, body, detail = await load(origin)
            rules = await self.interpret(status, body, detail)
            self._store(origin, rules)
            future.set_result(rules)
            return rules
        except BaseException as exc:
            future.set_exception(exc)
            future.exception()  # mark retrieved: waiters re-raise it themselves
            raise
        finally:
            self._pending.pop(origin, None)


def interpret(status: int | None, body: bytes, detail: str) -> RobotsRules:
    """Rules from a robots.txt answer (parsed here, on the caller's thread)."""
    now = time.monotonic()
    if status is None:  # timed out, broke off, refused: maybe our fault; ask again next time
        return RobotsRules("disallow-all", None, f"robots.txt unreachable ({detail})", now,
                           cache="never")
    if status >= 500:
        return RobotsRules("disallow-all", None, f"robots.txt unreachable ({detail})", now,
                           cache="brief")
    if 400 <= status < 500:
        return RobotsRules("allow-all", None, f"robots.txt status {status}: no rules", now)
    if 200 <= status < 300:
        try:
            parser, kept = parse_rules(body)
        except TooManyRules as exc:
            return RobotsRules("disallow-all", None, str(exc), now)
        return RobotsRules("parsed", parser, "robots.txt parsed", now,
                           size=256 + _MEMORY_PER_TEXT_BYTE * kept)
    return RobotsRules("disallow-all", None, f"robots.txt status {status}", now,
                       cache="brief")
