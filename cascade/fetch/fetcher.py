"""The sandboxed fetcher: text only, within strict limits, never into private networks.

Every URL becomes one ``FetchResult``; a failure is an outcome code, never an exception.
For each hop: normalize the URL, refuse userinfo and disallowed schemes and ports, resolve
the host (injectable resolver), keep only addresses the guard allows, pin the connection to
one of them, obey robots.txt, wait for the host's turn, send a GET with no cookies, no
credentials and no referer, and follow a redirect by hand (the redirect's body is never
read). The whole fetch, DNS to last byte, runs under one deadline, which starts when the
fetch leaves the fetcher's own queues (global concurrency, per-host slots and delay): time
waiting there has its own bound (``max_queue_s``, outcome ``queue-timeout``), so a long
queue behind one slow host never turns into timeouts of requests that were never sent.
Every byte read off the socket is counted (``wire.WireMeter``) against the caps.
"""

from __future__ import annotations

import asyncio
import contextvars
import socket
import ssl
import time
from collections.abc import AsyncIterator, Awaitable, Iterable, Iterator
from dataclasses import dataclass, field
from urllib.parse import urljoin

import h11
import httpcore
import httpx
from tenacity import (
    AsyncRetrying,
    RetryCallState,
    RetryError,
    retry_if_exception_type,
    stop_after_attempt,
)

from cascade.errors import InvalidURL
from cascade.fetch.address_guard import AddressGuard
from cascade.fetch.body import BadEncoding, BodyTooLarge, parse_encodings, read_capped
from cascade.fetch.charset import decode_text
from cascade.fetch.outcomes import FetchOutcome, FetchResult, Hop
from cascade.fetch.policy import FetchPolicy
from cascade.fetch.resolver import ResolutionError, Resolver, SystemResolver
from cascade.fetch.robots import RobotsCache
from cascade.fetch.transport import PinnedTransport, pinned, unpin
from cascade.fetch.wire import (
    WireCapExceeded,
    WireMeter,
    current_meter,
    metering,
    reset_metering,
)
from cascade.urls import DEFAULT_PORTS, UrlKey, normalize

__all__ = ["REDIRECT_STATUSES", "Fetcher", "SyncFetcher"]

REDIRECT_STATUSES = (301, 302, 303, 307, 308)


class _Stop(Exception):  # noqa: N818 - internal: ends a fetch with an outcome
    def __init__(self, outcome: FetchOutcome, detail: str, status: int | None = None) -> None:
        super().__init__(detail)
        self.outcome = outcome
        self.detail = detail
        self.status = status


class _Transient(Exception):  # noqa: N818 - internal: worth another try
    def __init__(self, detail: str, wait_s: float = 0.0, status: int | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.wait_s = wait_s
        self.status = status


@dataclass
class _HostState:
    slots: asyncio.Semaphore
    next_start: float = 0.0


@dataclass
class _Clock:
    """One fetch's time: the deadlines running now (the fetch's, a robots.txt load's) and
    the time spent in the fetcher's own queues, which none of them counts."""

    timeouts: list[asyncio.Timeout] = field(default_factory=list)
    queued_s: float = 0.0  # all time in the fetcher's queues
    queued_before: float = 0.0  # of it, waiting for a global fetch slot before the start
    started: float = 0.0


_CLOCK: contextvars.ContextVar[_Clock | None] = contextvars.ContextVar("cascade_fetch_clock",
                                                                       default=None)


_STARTS_PER_TURN = 8


class Fetcher:
    """Async fetcher. Use as ``async with Fetcher(policy) as f: await f.fetch(url)``.

    ``resolver`` answers DNS (default: the system's); ``ssl_context`` replaces the default
    certificate checks (tests pass one trusting their own CA).
    """

    def __init__(self, policy: FetchPolicy | None = None, resolver: Resolver | None = None,
                 ssl_context=None) -> None:
        self.policy = policy or FetchPolicy()
        self.resolver = resolver or SystemResolver()
        self.guard = AddressGuard(self.policy.allow_networks)
        limits = httpx.Limits(max_connections=self.policy.concurrency,
                              max_keepalive_connections=self.policy.concurrency,
                              keepalive_expiry=5.0)
        self.transport = PinnedTransport(
            limits, ssl_context=ssl_context,
            socket_options=[(socket.SOL_SOCKET, socket.SO_RCVBUF,
                             self.policy.receive_buffer_bytes)])
        self._global = asyncio.Semaphore(self.policy.concurrency)
        self._started_this_turn = 0
        self._hosts: dict[str, _HostState] = {}
        self._robots = RobotsCache(self.policy.robots_cache_s,
                                   max_bytes=self.policy.robots_cache_bytes,
                                   failure_ttl_s=self.policy.robots_failure_cache_s,
                                   parse_timeout_s=self.policy.robots_parse_timeout_s)

    async def __aenter__(self) -> Fetcher:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()

    async def aclose(self) -> None:
        self._robots.close()
        await self.transport.aclose()

    # ------------------------------------------------------------------ public
    async def fetch(self, url: str) -> FetchResult:
        """Fetch one URL within the policy; never raises for anything the network does."""
        hops: list[Hop] = []
        clock = _Clock()
        queued_at = time.monotonic()
        try:
            async with asyncio.timeout(self.policy.max_queue_s):
                await self._global.acquire()
        except TimeoutError:
            clock.queued_s = clock.queued_before = time.monotonic() - queued_at
            clock.started = time.monotonic()
            return self._result(url, hops, clock, FetchOutcome.QUEUE_TIMEOUT,
                                f"waited {self.policy.max_queue_s} s for a free fetch slot",
                                meter=None)
        await self._stagger()
        clock.queued_s = clock.queued_before = time.monotonic() - queued_at
        clock.started = time.monotonic()
        meter = WireMeter(self._wire_limit())
        clock_token = _CLOCK.set(clock)
        meter_token = metering(meter)
        try:
            async with asyncio.timeout(self.policy.deadline_s) as deadline:
                clock.timeouts.append(deadline)
                return await self._fetch(url, clock, hops, meter)
        except TimeoutError:
            return self._result(url, hops, clock, FetchOutcome.TIMEOUT,
                                f"deadline of {self.policy.deadline_s} s passed", meter=meter)
        except _Stop as stop:
            return self._result(url, hops, clock, stop.outcome, stop.detail, meter=meter,
                                status=stop.status)
        except Exception as exc:  # noqa: BLE001 - a fetch never raises: last resort
            return self._result(url, hops, clock, FetchOutcome.BAD_RESPONSE,
                                f"unexpected {type(exc).__name__}: {exc}"[:300], meter=meter)
        finally:
            reset_metering(meter_token)
            _CLOCK.reset(clock_token)
            self._global.release()

    async def _stagger(self) -> None:
        """Let at most ``_STARTS_PER_TURN`` fetches start per turn of the event loop: two
        hundred fetches handed over at once would otherwise all take their first steps in
        one turn, and every other task (other fetches' reads, the caller's) waits for all
        of them."""
        while self._started_this_turn >= _STARTS_PER_TURN:
            await asyncio.sleep(0)
        if self._started_this_turn == 0:
            asyncio.get_running_loop().call_soon(self._new_turn)
        self._started_this_turn += 1

    def _new_turn(self) -> None:
        self._started_this_turn = 0

    def _wire_limit(self) -> int:
        """Every byte one fetch may read off the socket: every hop's head, any 1xx
        responses, the body with its framing. One number, so it bounds bandwidth."""
        return self.policy.max_bytes

    async def _in_queue(self, waiting: Awaitable[object], what: str) -> None:
        """Wait for one of the fetcher's own queues with every running deadline paused and
        the fetch's queue time bounded by ``max_queue_s``."""
        clock = _CLOCK.get()
        if clock is None:  # not inside fetch(): no deadline to pause
            await waiting
            return
        left = self.policy.max_queue_s - clock.queued_s
        paused = [(t, t.when()) for t in clock.timeouts]
        for t, _ in paused:
            t.reschedule(None)
        began = time.monotonic()
        try:
            async with asyncio.timeout(max(left, 0.0)):
                await waiting
        except TimeoutError:
            raise _Stop(FetchOutcome.QUEUE_TIMEOUT,
                        f"waited over {self.policy.max_queue_s} s in the fetcher's queues "
                        f"({what})") from None
        finally:
            waited = time.monotonic() - began
            clock.queued_s += waited
            for t, when in paused:
                t.reschedule(None if when is None else when + waited)

    async def fetch_many(self, urls: Iterable[str], window: int | None = None
                         ) -> AsyncIterator[FetchResult]:
        """Fetch many URLs, at most ``window`` (default: the policy's concurrency) in flight;
        results come as they finish. Memory stays bounded by the window, not the count."""
        window = window or self.policy.concurrency
        it = iter(urls)
        running: set[asyncio.Task[FetchResult]] = set()
        try:
            for url in it:
                running.add(asyncio.create_task(self.fetch(url)))
                if len(running) >= window:
                    done, running = await asyncio.wait(running,
                                                       return_when=asyncio.FIRST_COMPLETED)
                    for task in done:
                        yield task.result()
            while running:
                done, running = await asyncio.wait(running, return_when=asyncio.FIRST_COMPLETED)
                for task in done:
                    yield task.result()
        finally:
            for task in running:
                task.cancel()

    # ------------------------------------------------------------------ steps
    def _result(self, url: str, hops: list[Hop], clock: _Clock, outcome: FetchOutcome,
                detail: str = "", meter: WireMeter | None = None, **kw) -> FetchResult:
        final = hops[-1].url if hops else url
        waited_inside = clock.queued_s - clock.queued_before  # host queues, after the start
        active = max(0.0, time.monotonic() - clock.started - waited_inside)
        return FetchResult(url=url, final_url=kw.pop("final_url", final), outcome=outcome,
                           elapsed_ms=active * 1000, queued_ms=clock.queued_s * 1000,
                           bytes_read=kw.pop("bytes_read", meter.read if meter else 0),
                           redirects=tuple(hops[:-1]) if hops else (), detail=detail, **kw)

    def _check_url(self, url: str) -> UrlKey:
        try:
            key = normalize(url)
        except InvalidURL as exc:
            raise _Stop(FetchOutcome.BAD_URL, exc.reason) from None
        if key.had_userinfo:
            raise _Stop(FetchOutcome.BAD_URL, "the URL carries user credentials")
        if key.scheme not in self.policy.schemes:
            raise _Stop(FetchOutcome.BAD_URL, f"scheme {key.scheme} is not allowed")
        return key

    def _check_port(self, key: UrlKey) -> int:
        """The hop's port, if the policy allows it. Checked after the address, so that a
        redirect to a refused address is reported as that, the more dangerous finding."""
        port = key.port or DEFAULT_PORTS[key.scheme]
        if port not in self.policy.ports:
            raise _Stop(FetchOutcome.BAD_URL, f"port {port} is not allowed")
        return port

    async def _checked_hop(self, key: UrlKey) -> tuple[int, str]:
        """``(port, address)`` of one hop: the address the guard allows, then the port."""
        port = key.port or DEFAULT_PORTS[key.scheme]
        address = await self._address(key, port)
        return self._check_port(key), address

    async def _address(self, key: UrlKey, port: int) -> str:
        if key.is_ip:
            answers = [key.host]
        else:
            try:
                answers = await self.resolver.resolve(key.host, port)
            except ResolutionError as exc:
                raise _Stop(FetchOutcome.DNS_ERROR, str(exc)) from None
            except Exception as exc:  # noqa: BLE001 - an injected resolver may raise anything
                raise _Stop(FetchOutcome.DNS_ERROR, f"resolver failed: {exc}"[:300]) from None
        refused = []
        for address in answers:
            decision = self.guard.check(address)
            if decision.allowed:
                return decision.address
            refused.append(f"{address}: {decision.reason}")
        raise _Stop(FetchOutcome.BLOCKED_ADDRESS, "; ".join(refused[:4]) or "no address")

    async def _host_turn(self, host: str) -> _HostState:
        state = self._hosts.get(host)
        if state is None:
            if len(self._hosts) > 100_000:
                self._hosts.clear()  # bounded memory on very long runs
            state = self._hosts[host] = _HostState(asyncio.Semaphore(
                self.policy.per_host_concurrency))
        return state

    async def _send(self, key: UrlKey, address: str, max_bytes: int,
                    truncate: bool = False) -> tuple[httpx.Response, bytes | None]:
        """One GET to a pinned address. Returns the response; for a redirect or error status
        the body is not read (None); otherwise the capped, decoded body (with ``truncate``,
        what fits under the caps, for robots.txt)."""
        port = key.port or DEFAULT_PORTS[key.scheme]
        state = await self._host_turn(key.host)
        await self._in_queue(state.slots.acquire(), f"a free slot for {key.host}")
        try:
            now = time.monotonic()
            if state.next_start > now:
                await self._in_queue(asyncio.sleep(state.next_start - now),
                                     f"the delay between requests to {key.host}")
            now = time.monotonic()
            state.next_start = max(now, state.next_start) + self.policy.per_host_delay_s
            return await self._exchange(key, port, address, max_bytes, truncate)
        finally:
            state.slots.release()

    async def _exchange(self, key: UrlKey, port: int, address: str, max_bytes: int,
                        truncate: bool) -> tuple[httpx.Response, bytes | None]:
        request = httpx.Request("GET", key.url, headers={
            "User-Agent": self.policy.user_agent,
            "Accept": "text/html,application/xhtml+xml,text/plain;q=0.9,*/*;q=0.1",
            "Accept-Encoding": "gzip, deflate",
            "Accept-Language": "en;q=0.9, *;q=0.5",
        }, extensions={"timeout": {"connect": self.policy.connect_timeout_s,
                                   "read": self.policy.deadline_s,
                                   "write": self.policy.deadline_s,
                                   "pool": self.policy.deadline_s}})
        meter = _current_meter()
        token = pinned(key.host, port, address)
        if meter is not None:  # the status line, headers and any 1xx responses before them
            meter.start_phase(self.policy.max_header_bytes, "response head", at_read=True)
        try:
            response = await self.transport.handle_async_request(request)
        except httpx.ConnectError as exc:
            text = str(exc)
            tls = _tls_failure(exc)
            if tls is not None:
                raise _Stop(FetchOutcome.TLS_ERROR, (text or str(tls))[:300]) from None
            raise _Transient(f"connect: {text[:300]}") from None
        except (httpx.ReadError, httpx.WriteError, httpx.RemoteProtocolError) as exc:
            text = str(exc)
            if _wire_cap(exc) or (meter is not None and meter.exceeded):
                raise _Stop(FetchOutcome.TOO_LARGE, (meter.exceeded if meter is not None and
                                                     meter.exceeded else text)[:300]) from None
            if _head_too_large(exc):
                raise _Stop(FetchOutcome.TOO_LARGE, "response headers too large") from None
            if isinstance(exc, httpx.RemoteProtocolError):
                raise _Stop(FetchOutcome.BAD_RESPONSE, f"not HTTP: {text[:200]}") from None
            raise _Transient(f"read: {text[:300]}") from None
        except httpx.TimeoutException as exc:
            raise _Stop(FetchOutcome.TIMEOUT, f"{type(exc).__name__}") from None
        except (httpx.HTTPError, httpcore.ConnectError) as exc:
            raise _Stop(FetchOutcome.CONNECT_ERROR, str(exc)[:300]) from None
        finally:
            unpin(token)
            if meter is not None:
                meter.end_phase()
        try:
            header_bytes = sum(len(k) + len(v) + 4 for k, v in response.headers.raw)
            if header_bytes > self.policy.max_header_bytes:
                raise _Stop(FetchOutcome.TOO_LARGE,
                            f"response headers are {header_bytes} bytes", response.status_code)
            status = response.status_code
            retry = self.policy.retry
            if retry.is_transient(status):
                wait = retry.parse_retry_after(response.headers.get("retry-after"))
                if retry.gives_up_on(wait):
                    raise _Stop(FetchOutcome.HTTP_ERROR,
                                f"status {status}, Retry-After {wait:.0f} s is over the "
                                f"limit of {retry.max_retry_after_s} s", status)
                raise _Transient(f"status {status}", wait or 0.0, status)
            if status in REDIRECT_STATUSES or status >= 400:
                return response, None
            # the body and its framing (chunk-size lines, extensions) count against the
            # fetch's wire meter, which already holds this hop's head and earlier hops
            body = await self._body(response, max_bytes, truncate)
            return response, body
        finally:
            await response.aclose()

    async def _body(self, response: httpx.Response, max_bytes: int,
                    truncate: bool = False) -> bytes:
        try:
            encodings = parse_encodings(response.headers.get("content-encoding"),
                                        self.policy.max_encoding_layers)
        except BadEncoding as exc:
            raise _Stop(FetchOutcome.BAD_RESPONSE, str(exc), response.status_code) from None
        length = response.headers.get("content-length")
        if not truncate and length and length.isdigit() and int(length) > max_bytes:
            raise _Stop(FetchOutcome.TOO_LARGE, f"Content-Length {length} is over the cap",
                        response.status_code)
        decoded_cap = max_bytes if truncate else self.policy.max_decoded_bytes
        meter = _current_meter()
        try:
            body, _ = await read_capped(_raw(response), encodings, max_bytes, decoded_cap,
                                        truncate=truncate,
                                        max_pieces=self.policy.max_body_chunks)
        except BodyTooLarge as exc:
            raise _Stop(FetchOutcome.TOO_LARGE, str(exc), response.status_code) from None
        except BadEncoding as exc:
            raise _Stop(FetchOutcome.BAD_RESPONSE, str(exc), response.status_code) from None
        except (httpx.ReadError, httpx.RemoteProtocolError) as exc:
            if _wire_cap(exc) or (meter is not None and meter.exceeded):
                raise _Stop(FetchOutcome.TOO_LARGE,
                            (meter.exceeded if meter is not None and meter.exceeded
                             else str(exc))[:300], response.status_code) from None
            raise _Stop(FetchOutcome.BAD_RESPONSE, f"body broken off: {exc}"[:300],
                        response.status_code) from None
        return body

    async def _get(self, key: UrlKey, address: str, max_bytes: int,
                   truncate: bool = False) -> tuple[httpx.Response, bytes | None]:
        """``_send`` with retries for transient failures (tenacity, driven by the policy's
        ``RetryPolicy``), inside the deadline."""
        retry = self.policy.retry

        def wait(state: RetryCallState) -> float:
            # tenacity asks after try number ``state.attempt_number`` failed
            failed = state.outcome.exception() if state.outcome else None
            return retry.wait_before(state.attempt_number + 1,
                                     getattr(failed, "wait_s", None))

        last: _Transient | None = None
        try:
            async for attempt in AsyncRetrying(
                stop=stop_after_attempt(retry.attempts),
                retry=retry_if_exception_type(_Transient),
                wait=wait,
                reraise=False,
            ):
                with attempt:
                    return await self._send(key, address, max_bytes, truncate)
        except RetryError as exc:
            last = exc.last_attempt.exception()  # type: ignore[assignment]
        if last is not None and last.status is not None:
            raise _Stop(FetchOutcome.HTTP_ERROR, f"{last.detail} after "
                        f"{retry.attempts} tries", last.status)
        raise _Stop(FetchOutcome.CONNECT_ERROR, last.detail if last else "failed")

    async def _robots_allowed(self, key: UrlKey, address: str) -> tuple[bool, str]:
        origin = key.url[: key.url.index("/", len(key.scheme) + 3)]  # brackets kept for IPv6

        async def load(origin_url: str) -> tuple[int | None, bytes, str]:
            # its own share of the deadline, so a stalling robots.txt is "unreachable"
            # (RFC 9309 section 2.3.1.4: assume complete disallow), not a fetch timeout;
            # and its own wire meter: its bytes count against the robots caps only
            hops = 6  # the robots.txt request and its five redirects
            robots_meter = WireMeter(self.policy.robots_max_bytes + (64 << 10)
                                     + hops * self.policy.max_header_bytes)
            token = metering(robots_meter)
            clock = _CLOCK.get()
            try:
                async with asyncio.timeout(self.policy.deadline_s / 3) as robots_deadline:
                    if clock is not None:
                        clock.timeouts.append(robots_deadline)
                    try:
                        return await load_within(origin_url)
                    finally:
                        if clock is not None:
                            clock.timeouts.remove(robots_deadline)
            except TimeoutError:
                return None, b"", "timed out"
            finally:
                reset_metering(token)

        async def load_within(origin_url: str) -> tuple[int | None, bytes, str]:
            target = normalize(origin_url + "/robots.txt")
            hops_left = 5  # RFC 9309 section 2.3.1.2: follow at least five redirects
            current, current_address = target, address
            while True:
                try:
                    response, body = await self._get(current, current_address,
                                                     self.policy.robots_max_bytes,
                                                     truncate=True)
                except _Stop as stop:
                    if stop.outcome is FetchOutcome.HTTP_ERROR and stop.status:
                        return stop.status, b"", stop.detail
                    if stop.outcome is FetchOutcome.QUEUE_TIMEOUT:
                        raise
                    if stop.outcome is FetchOutcome.TOO_LARGE:
                        return None, b"", f"robots.txt over its caps: {stop.detail}"
                    return None, b"", stop.detail
                if response.status_code in REDIRECT_STATUSES and hops_left > 0:
                    location = response.headers.get("location")
                    if not location:
                        return None, b"", "redirect without Location"
                    hops_left -= 1
                    current = self._check_url(_join(current.url, location))
                    _port, current_address = await self._checked_hop(current)
                    continue
                return response.status_code, body or b"", f"status {response.status_code}"

        try:
            rules = await self._robots.rules(origin, load)
        except _Stop as stop:
            return False, f"robots.txt: {stop.detail}"
        agent = self.policy.user_agent.split("/", 1)[0]
        return await self._robots.allows(rules, key.url, agent)

    async def _fetch(self, url: str, clock: _Clock, hops: list[Hop],
                     meter: WireMeter) -> FetchResult:
        current = url
        for _ in range(self.policy.max_redirects + 1):
            key = self._check_url(current)
            try:
                _port, address = await self._checked_hop(key)
            except _Stop:
                hops.append(Hop(key.url, None, None))
                raise
            if self.policy.obey_robots:
                allowed, why = await self._robots_allowed(key, address)
                if not allowed:
                    hops.append(Hop(key.url, address, None))
                    raise _Stop(FetchOutcome.ROBOTS_DISALLOWED, why)
            try:
                response, body = await self._get(key, address, self.policy.max_bytes)
            except _Stop:
                hops.append(Hop(key.url, address, None))
                raise
            status = response.status_code
            hops.append(Hop(key.url, address, status))
            if status in REDIRECT_STATUSES:
                location = response.headers.get("location")
                if not location:
                    raise _Stop(FetchOutcome.HTTP_ERROR, "redirect without Location", status)
                current = _join(key.url, location)
                continue
            if status >= 400:
                raise _Stop(FetchOutcome.HTTP_ERROR, f"status {status}", status)
            content_type = response.headers.get("content-type")
            media = (content_type or "").split(";", 1)[0].strip().lower()
            if media not in self.policy.content_types:
                raise _Stop(FetchOutcome.NOT_TEXT,
                            f"content type {media or '(none)'} is not allowed", status)
            assert body is not None
            if _looks_binary(body):
                raise _Stop(FetchOutcome.NOT_TEXT, "binary bytes behind a text content type",
                            status)
            text, codec = decode_text(body, content_type)
            if codec == "replacement":  # WHATWG: such labels decode to one U+FFFD
                raise _Stop(FetchOutcome.NOT_TEXT, "the declared encoding is one a browser "
                            "replaces by a single error character", status)
            return self._result(url, hops, clock, FetchOutcome.OK, "", meter=meter,
                                status=status, content_type=media, charset=codec, text=text)
        raise _Stop(FetchOutcome.TOO_MANY_REDIRECTS,
                    f"more than {self.policy.max_redirects} redirects")


async def _raw(response: httpx.Response) -> AsyncIterator[bytes]:
    async for chunk in response.stream:  # type: ignore[union-attr]
        yield chunk


def _join(base: str, location: str) -> str:
    try:
        return urljoin(base, location)
    except ValueError as exc:  # a hostile Location such as "http://[::1"
        raise _Stop(FetchOutcome.BAD_URL, f"bad redirect target: {exc}") from None


def _looks_binary(body: bytes) -> bool:
    head = body[:4096]
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return False  # UTF-16 text has NULs
    return b"\x00" in head


def _current_meter() -> WireMeter | None:
    return current_meter()


def _wire_cap(exc: BaseException) -> bool:
    """Whether a read failed because our own wire meter passed a cap."""
    return any(isinstance(e, WireCapExceeded) for e in _causes(exc))


def _causes(exc: BaseException) -> Iterator[BaseException]:
    """``exc`` and the exceptions behind it (``__cause__``, else ``__context__``), bounded."""
    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen and len(seen) < 32:
        seen.add(id(current))
        yield current
        current = current.__cause__ or current.__context__


def _tls_failure(exc: BaseException) -> ssl.SSLError | None:
    """The ``ssl.SSLError`` behind a connect failure (a certificate that does not verify,
    a handshake the server botched), or None when the connection itself failed.

    httpx raises ``ConnectError`` from httpcore's ``ConnectError``, raised from the
    ``ssl`` module's error. An EOF in the middle of the handshake (``ssl.SSLEOFError``)
    is the peer hanging up, a connection failure worth another try, as a reset is.
    """
    for cause in _causes(exc):
        if isinstance(cause, ssl.SSLError):
            return None if isinstance(cause, ssl.SSLEOFError) else cause
    return None


def _head_too_large(exc: BaseException) -> bool:
    """Whether h11 gave up because the response head outgrew its buffer.

    h11 raises ``RemoteProtocolError("Receive buffer too long", error_status_hint=431)``
    once an incomplete head passes its size limit (httpcore sets 100 KiB); httpcore and
    httpx keep that error in the chain. ``error_status_hint`` is public h11 API; 431 is
    "Request Header Fields Too Large" (RFC 6585 section 5), the one case that sets it.
    """
    return any(isinstance(cause, h11.RemoteProtocolError) and cause.error_status_hint == 431
               for cause in _causes(exc))


class SyncFetcher:
    """The blocking twin of ``Fetcher``: same policy, same results, its own event loop."""

    def __init__(self, policy: FetchPolicy | None = None, resolver: Resolver | None = None,
                 ssl_context=None) -> None:
        self._loop = asyncio.new_event_loop()
        self._fetcher = self._loop.run_until_complete(self._make(policy, resolver, ssl_context))

    @staticmethod
    async def _make(policy, resolver, ssl_context) -> Fetcher:
        return Fetcher(policy, resolver, ssl_context)

    def fetch(self, url: str) -> FetchResult:
        return self._loop.run_until_complete(self._fetcher.fetch(url))

    def fetch_many(self, urls: Iterable[str]) -> list[FetchResult]:
        async def run() -> list[FetchResult]:
            return [r async for r in self._fetcher.fetch_many(urls)]

        return self._loop.run_until_complete(run())

    def close(self) -> None:
        self._loop.run_until_complete(self._fetcher.aclose())
        self._loop.close()

    def __enter__(self) -> SyncFetcher:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
