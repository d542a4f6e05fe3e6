"""The loopback site farm: one real HTTP server on 127.0.0.1 that plays every site of the
demo scenario. It listens on an ephemeral port; clients reach it through a resolver
override that maps every scenario host name to 127.0.0.1 (``SiteFarm.resolver()``).

A small HTTP/1.1 server on asyncio, written here rather than taken from ``http.server``
because the benchmark needs keep-alive at 100-way concurrency and extra routes need
byte-level control: ``extra_routes`` maps a path prefix to a handler that answers with a
``Reply`` (a body, a stream, or raw bytes written as is). The fetcher's hostile test cases
plug in that way from ``tests/hostile_cases.py``; they are not part of the package.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import threading
import zlib
from collections.abc import Awaitable, Callable, Iterable, Mapping
from dataclasses import dataclass, field
from urllib.parse import parse_qs, urlsplit

from cascade.scenario.pages import render_page
from cascade.scenario.telemetry import TelemetryRecord
from cascade.urls import normalize

__all__ = ["FarmRequest", "FarmStats", "Reply", "Route", "SiteFarm"]

MAX_REQUEST_HEAD = 16 << 10


@dataclass
class FarmStats:
    connections: int = 0
    requests: int = 0
    paths: list[str] = field(default_factory=list)


@dataclass
class Reply:
    """One answer of the farm. ``raw`` is written as is, then the connection closes;
    ``stream`` writes a chunked body itself (the chunk framing included), then the
    connection closes; otherwise ``body`` with a Content-Length."""

    status: int = 200
    headers: list[tuple[str, str]] = field(default_factory=list)
    body: bytes = b""
    raw: bytes | None = None
    stream: Callable[[asyncio.StreamWriter], Awaitable[object]] | None = None
    close: bool = False


@dataclass(frozen=True)
class FarmRequest:
    """One request as an extra route sees it. ``headers`` names are lower-case; ``host``
    is the Host header without its port; ``query`` as ``urllib.parse.parse_qs`` gives it."""

    method: str
    target: str
    path: str
    query: dict[str, list[str]]
    headers: dict[str, str]
    host: str


# an extra route: answers a request, or returns None to leave it to the farm's own sites
Route = Callable[[FarmRequest], Awaitable[Reply | None]]


_REASONS = {200: "OK", 301: "Moved Permanently", 302: "Found", 304: "Not Modified",
            404: "Not Found", 429: "Too Many Requests", 500: "Internal Server Error",
            503: "Service Unavailable"}


class SiteFarm:
    """``with SiteFarm(records) as farm:`` serves the sites; ``farm.port``, ``farm.stats``.

    ``records``: the scenario's telemetry (``url``, ``label``, ``page_seed``); a known host
    with an unknown path gets a page of the site's category. ``host`` and ``port`` choose
    the listening address (port 0: ephemeral). ``gzip_pages`` compresses page bodies when
    the client accepts gzip. ``extra_routes`` maps a path prefix to a ``Route`` asked
    first for every path that starts with it (tests use it for hostile cases).
    """

    def __init__(self, records: Iterable[TelemetryRecord] = (), host: str = "127.0.0.1",
                 port: int = 0, gzip_pages: bool = True,
                 extra_routes: Mapping[str, Route] | None = None) -> None:
        self.host = host
        self.requested_port = port
        self.gzip_pages = gzip_pages
        self.extra_routes = dict(extra_routes or {})
        self.pages: dict[tuple[str, str], tuple[str, int]] = {}
        self.sites: dict[str, tuple[str, int]] = {}
        for rec in records:
            try:
                key = normalize(rec.url)
            except ValueError:
                continue
            target = key.path + (f"?{key.query}" if key.query else "")
            self.pages[(key.host, target)] = (rec.label, rec.page_seed)
            self.sites.setdefault(key.host, (rec.label, rec.page_seed))
        self.stats = FarmStats()
        self.port = 0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: threading.Thread | None = None
        self._server: asyncio.base_events.Server | None = None
        self._ready = threading.Event()

    # ------------------------------------------------------------------ lifecycle
    def __enter__(self) -> SiteFarm:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="site-farm", daemon=True)
        self._thread.start()
        if not self._ready.wait(10):
            raise RuntimeError("site farm did not start within 10 s")
        if self._error is not None:
            raise self._error

    _error: Exception | None = None

    def _run(self) -> None:
        self._loop = asyncio.new_event_loop()
        asyncio.set_event_loop(self._loop)
        try:
            self._server = self._loop.run_until_complete(asyncio.start_server(
                self._serve, self.host, self.requested_port, limit=MAX_REQUEST_HEAD,
                backlog=1024))
            self.port = self._server.sockets[0].getsockname()[1]
        except OSError as exc:
            self._error = exc
            self._ready.set()
            return
        self._ready.set()
        self._loop.run_forever()
        self._server.close()
        self._loop.run_until_complete(self._server.wait_closed())
        pending = asyncio.all_tasks(self._loop)
        for task in pending:
            task.cancel()
        self._loop.run_until_complete(asyncio.gather(*pending, return_exceptions=True))
        self._loop.close()

    def stop(self) -> None:
        if self._loop is not None and self._loop.is_running():
            self._loop.call_soon_threadsafe(self._loop.stop)
        if self._thread is not None:
            self._thread.join(10)

    def resolver(self, extra: dict[str, list[str]] | None = None):
        """A resolver that answers every name with this farm's address (plus ``extra``)."""
        from cascade.fetch.resolver import StaticResolver

        class _Everything(StaticResolver):
            async def resolve(inner, host: str, port: int) -> list[str]:  # noqa: N805
                key = host.lower().rstrip(".")
                if key in inner.answers:
                    return await StaticResolver.resolve(inner, host, port)
                return [self.host]

        return _Everything(extra or {})

    def url(self, host: str, path: str = "/") -> str:
        return f"http://{host}:{self.port}{path}"

    # ------------------------------------------------------------------ serving
    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.stats.connections += 1
        try:
            while True:
                try:
                    head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), 30)
                except (asyncio.IncompleteReadError, asyncio.LimitOverrunError,
                        TimeoutError, ConnectionError):
                    return
                lines = head.decode("latin-1").split("\r\n")
                try:
                    method, target, _version = lines[0].split(" ", 2)
                except ValueError:
                    return
                headers = {}
                for line in lines[1:]:
                    if ":" in line:
                        k, v = line.split(":", 1)
                        headers[k.strip().lower()] = v.strip()
                self.stats.requests += 1
                if len(self.stats.paths) < 10_000:
                    self.stats.paths.append(target)
                reply = await self._route(method, target, headers)
                if reply.raw is not None:
                    writer.write(reply.raw)
                    await writer.drain()
                    return
                keep = not reply.close and headers.get("connection", "").lower() != "close"
                head_out = [f"HTTP/1.1 {reply.status} {_REASONS.get(reply.status, 'Status')}"]
                names = {k.lower() for k, _ in reply.headers}
                if reply.stream is None and "content-length" not in names:
                    reply.headers.append(("Content-Length", str(len(reply.body))))
                if reply.stream is not None:
                    reply.headers.append(("Transfer-Encoding", "chunked"))
                if not keep:
                    reply.headers.append(("Connection", "close"))
                head_out += [f"{k}: {v}" for k, v in reply.headers]
                writer.write(("\r\n".join(head_out) + "\r\n\r\n").encode("latin-1"))
                if reply.stream is not None:
                    await reply.stream(writer)  # type: ignore[misc]
                    return
                if method != "HEAD":
                    writer.write(reply.body)
                await writer.drain()
                if not keep:
                    return
        except (ConnectionError, asyncio.CancelledError):
            return
        finally:
            with contextlib.suppress(RuntimeError):
                writer.close()

    async def _route(self, method: str, target: str, headers: dict[str, str]) -> Reply:
        host = headers.get("host", "").rsplit(":", 1)[0].lower().strip("[]")
        parts = urlsplit(target)
        path = parts.path
        for prefix, route in self.extra_routes.items():
            if path.startswith(prefix):
                reply = await route(FarmRequest(method, target, path, parse_qs(parts.query),
                                                headers, host))
                if reply is not None:
                    return reply
        if path == "/robots.txt":
            return Reply(404, [("Content-Type", "text/plain")], b"no robots.txt here")
        key = (host, target)
        found = self.pages.get(key) or self.sites.get(host)
        if found is None:
            return Reply(404, [("Content-Type", "text/html")], b"<h1>Not found</h1>")
        label, seed = found
        if key not in self.pages:
            seed = zlib.crc32(target.encode()) ^ seed
        body = render_page(f"http://{host}{target}", label, seed).encode("utf-8")
        out = [("Content-Type", "text/html; charset=utf-8")]
        if self.gzip_pages and "gzip" in headers.get("accept-encoding", ""):
            body = gzip.compress(body, compresslevel=5)
            out.append(("Content-Encoding", "gzip"))
        return Reply(200, out, body)
