"""The fetcher's limits, measured on the server side: byte-level hostile servers on loopback.

Every case is played by ``raw_servers.RawServer``, which counts the bytes its socket
accepted before the fetcher hung up. A small send buffer on the server keeps kernel
buffering from hiding how much the fetcher read, so "the server sent at most the cap plus
``SOCKET_SLACK``" is a bound on what the fetcher really read, whatever it reports itself.

Elapsed-time checks are about the sandbox's limits, not speed: each says the fetch ended
well before its deadline (a cap stopped it, not the clock), with room for a loaded machine.
All traffic goes to 127.0.0.1; every server case stops by itself (64 MiB, 20 s).
"""

from __future__ import annotations

import asyncio
import dataclasses
import time
from collections.abc import Iterable

import pytest
from raw_servers import (
    ROBOTS_LATE_OFFSET,
    SOCKET_SLACK,
    Exchange,
    LoopTicker,
    RawServer,
    robots_gzip_bomb_bytes,
)

from cascade.fetch import (
    Fetcher,
    FetchOutcome,
    FetchPolicy,
    FetchResult,
    RetryPolicy,
    StaticResolver,
)

DEADLINE = 5.0
MAX_BYTES = 256 << 10
MAX_HEADER_BYTES = 16 << 10
ROBOTS_MAX_BYTES = 500 << 10  # RFC 9309 section 2.5: a parser must read at least 500 KiB
#: A fetch stopped by a cap ends "well before the deadline": under half of it. On loopback
#: the capped reads here take well under a second even on a loaded machine; a fetch that
#: is stopped by the clock instead takes the whole deadline.
WELL_BEFORE = DEADLINE / 2


@pytest.fixture()
def server():
    with RawServer() as s:
        yield s


@pytest.fixture()
def policy(server) -> FetchPolicy:
    """Small caps, one retry (so a fetch that is not ended "at once" shows as a second
    request), robots.txt off unless a test is about it."""
    return FetchPolicy(ports=(server.port,), allow_networks=("127.0.0.1/32",),
                       deadline_s=DEADLINE, per_host_delay_s=0.0, obey_robots=False,
                       max_bytes=MAX_BYTES, max_header_bytes=MAX_HEADER_BYTES,
                       robots_max_bytes=ROBOTS_MAX_BYTES, retry=RetryPolicy(retries=1))


def resolver_for(urls: Iterable[str]) -> StaticResolver:
    """A StaticResolver answering 127.0.0.1 for every host name in ``urls``."""
    hosts = {u.split("://", 1)[1].split("/", 1)[0].rsplit(":", 1)[0] for u in urls}
    return StaticResolver({h: ["127.0.0.1"] for h in hosts})


def fetch_all(policy: FetchPolicy, urls: list[str], together: bool = False
              ) -> tuple[list[FetchResult], float]:
    """Fetch ``urls`` with one Fetcher in one event loop, one after another (or all at once
    with ``together``); returns the results in order and the wall time in seconds."""
    async def run() -> list[FetchResult]:
        async with Fetcher(policy, resolver_for(urls)) as fetcher:
            if together:
                return list(await asyncio.gather(*(fetcher.fetch(u) for u in urls)))
            return [await fetcher.fetch(u) for u in urls]

    started = time.monotonic()
    results = asyncio.run(run())
    return results, time.monotonic() - started


def only_exchange(server: RawServer, path: str) -> Exchange:
    """The one exchange for ``path``, once the server is done with it (bounded wait).
    One and only one: a fetch ended "at once" is not tried again."""
    assert server.settle(10), "the server was still serving 10 s after the fetch ended"
    found = server.requests(path=path)
    assert len(found) == 1, f"{len(found)} requests for {path} (a cap must not be retried)"
    return found[0]


def explain(result: FetchResult) -> str:
    return (f"{result.outcome} ({result.detail!r}), {result.bytes_read} bytes read, "
            f"{result.elapsed_ms:.0f} ms")


# ---------------------------------------------------------------- the response head
@pytest.mark.parametrize("case", [
    # RFC 9110 section 15.2: any number of 1xx responses may come before the final one,
    # so only the header cap (bytes before the final head ends) can stop an endless run
    "continue-flood", "early-hints-flood",
    # RFC 9112 section 5.2: obs-fold continues a field line; section 2.1: the header
    # section ends only at an empty line, which never comes here
    "endless-header-fold", "endless-header-lines",
])
def test_an_endless_response_head_stops_at_the_header_cap(server, policy, case) -> None:
    path = f"/_raw/{case}"
    (result,), elapsed = fetch_all(policy, [server.url(f"{case}.test", path)])
    assert result.outcome is FetchOutcome.TOO_LARGE, explain(result)
    assert elapsed < WELL_BEFORE, explain(result)
    exchange = only_exchange(server, path)
    assert exchange.client_closed, f"the server ended the case itself: {exchange.ended_by}"
    assert exchange.bytes_sent <= MAX_HEADER_BYTES + SOCKET_SLACK, exchange.bytes_sent
    # the cap is on bytes read: one byte past it is enough to see it was passed
    assert MAX_HEADER_BYTES <= result.bytes_read <= MAX_HEADER_BYTES + 1, explain(result)


# ---------------------------------------------------------------- the body and its framing
@pytest.mark.parametrize("case", [
    # RFC 9112 section 7.1: "1" CRLF "x" CRLF is six bytes on the wire per body byte; a
    # cap on body bytes alone would let six times the cap through (the chunk-count cap is
    # lifted here, so the byte count is what stops it)
    "tiny-chunks",
    # RFC 9112 section 7.1.1: chunk extensions sit on the chunk-size line and never reach
    # the body; 4 KiB of extension per body byte is 4096 times the body on the wire
    "chunk-extensions",
])
def test_chunk_framing_counts_against_the_wire_cap(server, policy, case) -> None:
    path = f"/_raw/{case}"
    policy = dataclasses.replace(policy, max_body_chunks=10**7)
    (result,), elapsed = fetch_all(policy, [server.url(f"{case}.test", path)])
    assert result.outcome is FetchOutcome.TOO_LARGE, explain(result)
    assert elapsed < WELL_BEFORE, explain(result)
    exchange = only_exchange(server, path)
    assert exchange.client_closed, exchange.ended_by
    assert exchange.bytes_sent <= MAX_BYTES + SOCKET_SLACK, exchange.bytes_sent
    # the framing was counted: the fetch read the cap's worth of wire bytes (its body
    # alone is a small part of that, far under the cap)
    assert result.bytes_read >= MAX_BYTES, explain(result)


def test_tiny_chunks_are_stopped_by_their_count(server, policy) -> None:
    # parsing a chunk costs CPU whatever its size: 8192 one-byte chunks are about 48 KiB
    # on the wire, far under the byte cap, and the fetch ends there
    path = "/_raw/tiny-chunks"
    (result,), elapsed = fetch_all(policy, [server.url("count.test", path)])
    assert result.outcome is FetchOutcome.TOO_LARGE, explain(result)
    assert "8192 body chunks" in result.detail, explain(result)
    assert elapsed < WELL_BEFORE, explain(result)
    exchange = only_exchange(server, path)
    assert exchange.client_closed, exchange.ended_by
    assert result.bytes_read < MAX_BYTES // 2, explain(result)


def test_wire_cap_counts_the_response_head_with_the_body(server, policy) -> None:
    # max_bytes is every byte one fetch reads off the socket, the head included: the fetch
    # ends one byte past it (the byte that shows the cap was passed), not a head later
    path = "/_raw/tiny-chunks"
    policy = dataclasses.replace(policy, max_body_chunks=10**7)
    (result,), _ = fetch_all(policy, [server.url("whole.test", path)])
    assert result.outcome is FetchOutcome.TOO_LARGE, explain(result)
    assert MAX_BYTES <= result.bytes_read <= MAX_BYTES + 1, explain(result)


def test_wire_cap_counts_the_heads_of_every_hop(server, policy) -> None:
    # five redirects with 12 KiB heads (each under the 16 KiB header cap), then a 40 KiB
    # page: the page alone fits the 64 KiB cap, the whole fetch (about 112 KiB) does not
    small = dataclasses.replace(policy, max_bytes=64 << 10, max_redirects=5)
    alone = server.url("hops.test", "/_raw/padded-redirect?n=0&pad=12000&body=40000")
    chain = server.url("hops.test", "/_raw/padded-redirect?n=5&pad=12000&body=40000")
    (single,), _ = fetch_all(small, [alone])
    assert single.outcome is FetchOutcome.OK, explain(single)
    (result,), elapsed = fetch_all(small, [chain])
    assert result.outcome is FetchOutcome.TOO_LARGE, explain(result)
    assert result.bytes_read <= small.max_bytes + 1, explain(result)
    assert elapsed < WELL_BEFORE, explain(result)


# ---------------------------------------------------------------- robots.txt (RFC 9309)
def robots_policy(policy: FetchPolicy, **changes) -> FetchPolicy:
    return dataclasses.replace(policy, obey_robots=True, **changes)


def test_robots_bomb_is_parsed_up_to_its_cap_and_the_rest_ignored(server, policy) -> None:
    # RFC 9309 section 2.5: a parser must read at least 500 KiB and may ignore the rest.
    # The file is ~32 KiB of gzip that decodes to 32 MiB of rules: /early/ is disallowed
    # at its top, /x123/ throughout, /late/ only at 1 MiB, past the cap
    assert len(robots_gzip_bomb_bytes()) < 64 << 10 and ROBOTS_LATE_OFFSET > ROBOTS_MAX_BYTES
    host = "robots-gzip-bomb.test"
    urls = [server.url(host, p) for p in ("/early/page", "/x123/page", "/late/page",
                                           "/other/page")]
    results, elapsed = fetch_all(robots_policy(policy), urls)
    early, filler, late, other = results
    assert early.outcome is FetchOutcome.ROBOTS_DISALLOWED, explain(early)
    assert filler.outcome is FetchOutcome.ROBOTS_DISALLOWED, explain(filler)
    assert late.outcome is FetchOutcome.OK, explain(late)
    assert other.outcome is FetchOutcome.OK, explain(other)
    assert elapsed < WELL_BEFORE
    assert server.settle(10)
    # parsed rules are kept (RFC 9309 section 2.4): one load for the four fetches
    assert server.count(host, "/robots.txt") == 1


def test_endless_robots_is_read_up_to_its_cap_and_the_rest_ignored(server, policy) -> None:
    # RFC 9309 section 2.5 again, for a plain file that never ends (no length, the
    # connection never closes): the first 500 KiB are rules, the rest is not read
    host = "robots-endless.test"
    urls = [server.url(host, "/early/page"), server.url(host, "/late/page")]
    (early, late), elapsed = fetch_all(robots_policy(policy), urls)
    assert early.outcome is FetchOutcome.ROBOTS_DISALLOWED, explain(early)
    assert late.outcome is FetchOutcome.OK, explain(late)
    assert elapsed < WELL_BEFORE
    exchange = only_exchange(server, "/robots.txt")
    assert exchange.client_closed, exchange.ended_by
    assert exchange.bytes_sent <= ROBOTS_MAX_BYTES + SOCKET_SLACK, exchange.bytes_sent


def test_robots_bomb_does_not_stall_other_fetches(server, policy) -> None:
    # in one event loop: two robots.txt bombs (a gzip one and an endless one) and twenty
    # good pages on other hosts, all at once; the bombs are read and parsed while the
    # good pages go on (parsing runs in a worker thread). A loop stall under 0.5 s is the
    # sandbox's bound here, generous for a loaded machine: parsing all 32 MiB of the bomb
    # on the loop takes seconds
    bombs = [server.url("robots-gzip-bomb-2.test", "/late/page"),
             server.url("robots-endless-2.test", "/late/page")]
    good = [server.url(f"good-{i}.test", f"/page/{i}") for i in range(20)]
    urls = bombs + good
    fast = robots_policy(policy, deadline_s=3.0)

    async def run() -> tuple[list[FetchResult], float]:
        async with LoopTicker() as ticker, Fetcher(fast, resolver_for(urls)) as fetcher:
            results = await asyncio.gather(*(fetcher.fetch(u) for u in urls))
        return list(results), ticker.worst_gap_s

    started = time.monotonic()
    results, worst_gap = asyncio.run(run())
    elapsed = time.monotonic() - started
    for result in results[len(bombs):]:
        assert result.outcome is FetchOutcome.OK, explain(result)
    for result in results[:len(bombs)]:
        assert result.outcome is not FetchOutcome.TIMEOUT, explain(result)
    assert worst_gap < 0.5, f"the event loop stalled for {worst_gap:.3f} s"
    assert elapsed < fast.deadline_s


def test_robots_timeout_is_not_cached_as_disallow(server, policy) -> None:
    # RFC 9309 section 2.3.1.4: an unreachable robots.txt means "disallow all" for now;
    # a load that timed out may be our own fault, so the next fetch asks again. The
    # server stalls only the first robots.txt request, then allows everything
    host = "robots-stall.test"
    short = robots_policy(policy, deadline_s=1.5)
    urls = [server.url(host, "/first"), server.url(host, "/second")]
    (first, second), _ = fetch_all(short, urls)
    assert first.outcome is FetchOutcome.ROBOTS_DISALLOWED, explain(first)
    assert first.elapsed_ms < short.deadline_s * 1000, explain(first)
    assert second.outcome is FetchOutcome.OK, explain(second)
    assert server.settle(10)
    stalled, *later = server.requests(host, "/robots.txt")
    assert len(later) == 1, "robots.txt was not asked again after the timeout"
    assert stalled.client_closed, f"the fetcher never hung up: {stalled.ended_by}"


# ---------------------------------------------------------------- gzip
@pytest.mark.parametrize("framing", ["length", "chunked", "close", "broken"])
def test_truncated_gzip_is_a_bad_response(server, policy, framing) -> None:
    # RFC 1952 section 2.3: a gzip member ends with CRC32 and ISIZE; a stream cut before
    # them is not a page, however the HTTP message itself ends (RFC 9112 section 6.3)
    path = "/_raw/truncated-gzip"
    (result,), elapsed = fetch_all(policy, [server.url("gzip.test", f"{path}?framing={framing}")])
    assert result.outcome is FetchOutcome.BAD_RESPONSE, explain(result)
    assert result.text is None
    assert elapsed < WELL_BEFORE, explain(result)
    exchange = only_exchange(server, path)
    assert exchange.ended_by == "done", exchange.ended_by


def test_whole_gzip_page_is_ok(server, policy) -> None:
    # the control for the truncated cases: the same stream, whole
    (result,), _ = fetch_all(policy, [server.url("gzip.test", "/_raw/whole-gzip")])
    assert result.outcome is FetchOutcome.OK, explain(result)
    assert "word" in (result.text or "")


# ---------------------------------------------------------------- queues and the deadline
def politeness_policy(policy: FetchPolicy, **changes) -> FetchPolicy:
    return dataclasses.replace(policy, per_host_delay_s=0.1, per_host_concurrency=1,
                               deadline_s=1.0, obey_robots=True, **changes)


def test_queue_time_does_not_count_against_the_deadline(server, policy) -> None:
    # 25 pages of one host, one at a time, 0.1 s apart: the last waits about 2.5 s for
    # its turn, more than its 1 s deadline, and is still fetched
    polite = politeness_policy(policy)
    urls = [server.url("polite.test", f"/page/{i}") for i in range(25)]
    results, _ = fetch_all(polite, urls, together=True)
    for result in results:
        assert result.outcome is FetchOutcome.OK, explain(result)
        assert result.elapsed_ms < polite.deadline_s * 1000, explain(result)
    assert max(r.queued_ms for r in results) > polite.deadline_s * 1000
    assert server.settle(10)
    seen = [e.request.path for e in server.requests("polite.test")
            if e.request.path != "/robots.txt"]
    assert sorted(seen) == sorted(f"/page/{i}" for i in range(25))


def test_queue_bound_gives_its_own_outcome(server, policy) -> None:
    # the same queue with max_queue_s = 0.35: the first few are fetched, the late ones end
    # queue-timeout, and the server never saw them
    polite = politeness_policy(policy, max_queue_s=0.35)
    urls = [server.url("queue.test", f"/page/{i}") for i in range(25)]
    results, elapsed = fetch_all(polite, urls, together=True)
    outcomes = {r.outcome for r in results}
    assert outcomes == {FetchOutcome.OK, FetchOutcome.QUEUE_TIMEOUT}, outcomes
    for result in results:
        if result.outcome is FetchOutcome.QUEUE_TIMEOUT:
            assert str(result.outcome) == "queue-timeout"
            assert result.queued_ms >= 0.9 * polite.max_queue_s * 1000, explain(result)
            assert result.status is None and result.bytes_read == 0, explain(result)
    assert server.settle(10)
    seen = {e.request.path for e in server.requests("queue.test")
            if e.request.path != "/robots.txt"}
    fetched = {r.url.split(str(server.port), 1)[1] for r in results if r.ok}
    assert seen == fetched
    assert elapsed < 25 * polite.per_host_delay_s  # the late ones did not wait their turn
