"""The loopback site farm: one real HTTP server on 127.0.0.1 that plays every site of the
demo scenario, and, under ``/_hostile/``, the worst corners of the web for the fetcher's
tests. It listens on an ephemeral port; clients reach it through a resolver override that
maps every scenario host name to 127.0.0.1 (``SiteFarm.resolver()``).

A small HTTP/1.1 server on asyncio, written here rather than taken from ``http.server``
because the hostile cases need byte-level control (trickled bodies, raw garbage, endless
streams, chosen header sizes) and the benchmark needs keep-alive at 100-way concurrency.
Bounded: every endless or slow response stops by itself within a minute.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import os
import threading
import zlib
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from urllib.parse import parse_qs, unquote, urlsplit

from cascade.scenario.pages import render_page
from cascade.scenario.telemetry import TelemetryRecord
from cascade.urls import normalize

MAX_REQUEST_HEAD = 16 << 10
BOMB_SIZE = 64 << 20  # decoded size of the compression bombs


def _bomb(layers: int) -> bytes:
    data = b"\0" * BOMB_SIZE
    for _ in range(layers):
        data = gzip.compress(data, compresslevel=9)
    return data


@dataclass
class FarmStats:
    connections: int = 0
    requests: int = 0
    paths: list[str] = field(default_factory=list)


@dataclass
class _Reply:
    status: int = 200
    headers: list[tuple[str, str]] = field(default_factory=list)
    body: bytes = b""
    raw: bytes | None = None  # written as is, then the connection closes
    stream: Callable[[asyncio.StreamWriter], object] | None = None
    close: bool = False


_REASONS = {200: "OK", 301: "Moved Permanently", 302: "Found", 304: "Not Modified",
            404: "Not Found", 429: "Too Many Requests", 500: "Internal Server Error",
            503: "Service Unavailable"}


class SiteFarm:
    """``with SiteFarm(records) as farm:`` serves the sites; ``farm.port``, ``farm.stats``.

    ``records``: the scenario's telemetry (``url``, ``label``, ``page_seed``); a known host
    with an unknown path gets a page of the site's category. ``host`` and ``port`` choose
    the listening address (port 0: ephemeral). ``gzip_pages`` compresses page bodies when
    the client accepts gzip.
    """

    def __init__(self, records: Iterable[TelemetryRecord] = (), host: str = "127.0.0.1",
                 port: int = 0, gzip_pages: bool = True) -> None:
        self.host = host
        self.requested_port = port
        self.gzip_pages = gzip_pages
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
        self._bombs: dict[int, bytes] = {}
        self._counters: dict[str, int] = {}

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

    async def _route(self, method: str, target: str, headers: dict[str, str]) -> _Reply:
        host = headers.get("host", "").rsplit(":", 1)[0].lower().strip("[]")
        parts = urlsplit(target)
        path = parts.path
        if path.startswith("/_hostile/"):
            return await self._hostile(path[len("/_hostile/"):], parse_qs(parts.query),
                                       headers, host)
        if path == "/robots.txt":
            return await self._robots(host)
        key = (host, target)
        found = self.pages.get(key) or self.sites.get(host)
        if found is None:
            return _Reply(404, [("Content-Type", "text/html")], b"<h1>Not found</h1>")
        label, seed = found
        if key not in self.pages:
            seed = zlib.crc32(target.encode()) ^ seed
        body = render_page(f"http://{host}{target}", label, seed).encode("utf-8")
        out = [("Content-Type", "text/html; charset=utf-8")]
        if self.gzip_pages and "gzip" in headers.get("accept-encoding", ""):
            body = gzip.compress(body, compresslevel=5)
            out.append(("Content-Encoding", "gzip"))
        return _Reply(200, out, body)

    async def _robots(self, host: str) -> _Reply:
        if host.startswith("robots-deny."):
            return _Reply(200, [("Content-Type", "text/plain")],
                          b"User-agent: *\nDisallow: /\n")
        if host.startswith("robots-partial."):
            return _Reply(200, [("Content-Type", "text/plain")],
                          b"User-agent: *\nDisallow: /private/\n")
        if host.startswith("robots-slow."):
            await asyncio.sleep(30)
            return _Reply(200, [("Content-Type", "text/plain")], b"User-agent: *\nAllow: /\n")
        if host.startswith("robots-5xx."):
            return _Reply(503, [("Content-Type", "text/plain")], b"busy")
        return _Reply(404, [("Content-Type", "text/plain")], b"no robots.txt here")

    def _html(self, text: str = "<p>A plain small page for the hostile suite.</p>") -> _Reply:
        return _Reply(200, [("Content-Type", "text/html; charset=utf-8")],
                      f"<html><head><title>ok</title></head><body>{text}</body></html>".encode())

    async def _hostile(self, case: str, query: dict[str, list[str]], headers: dict[str, str],
                       host: str) -> _Reply:
        q = {k: v[0] for k, v in query.items()}
        if case == "page":
            return self._html()
        if case == "redirect":
            return _Reply(302, [("Location", unquote(q.get("to", "/")))])
        if case == "redirect-loop":
            return _Reply(302, [("Location", "/_hostile/redirect-loop")])
        if case.startswith("chain/"):
            n = int(case.split("/", 1)[1])
            if n <= 0:
                return self._html("<p>end of the chain</p>")
            return _Reply(301, [("Location", f"/_hostile/chain/{n - 1}")])
        if case in ("gzip-bomb", "nested-bomb", "triple-gzip"):
            layers = {"gzip-bomb": 1, "nested-bomb": 2, "triple-gzip": 3}[case]
            if layers not in self._bombs:
                self._bombs[layers] = await asyncio.to_thread(_bomb, layers)
            return _Reply(200, [("Content-Type", "text/html"),
                                ("Content-Encoding", ", ".join(["gzip"] * layers))],
                          self._bombs[layers])
        if case == "endless":
            async def endless(writer: asyncio.StreamWriter) -> None:
                chunk = b"<p>" + b"more text " * 800 + b"</p>"
                frame = f"{len(chunk):x}\r\n".encode() + chunk + b"\r\n"
                for _ in range(20_000):  # about 160 MB at most, then it stops by itself
                    writer.write(frame)
                    await writer.drain()
            return _Reply(200, [("Content-Type", "text/html")], stream=endless)
        if case == "trickle":
            async def trickle(writer: asyncio.StreamWriter) -> None:
                for _ in range(60):  # one byte a second for at most a minute
                    writer.write(b"1\r\na\r\n")
                    await writer.drain()
                    await asyncio.sleep(1.0)
            return _Reply(200, [("Content-Type", "text/html")], stream=trickle)
        if case == "slow-headers":
            await asyncio.sleep(float(q.get("s", "30")))
            return self._html()
        if case == "huge-headers":  # past h11's own 100 KiB limit on a response head
            return _Reply(200, [("Content-Type", "text/html")] +
                          [(f"X-Filler-{i}", "x" * 1000) for i in range(200)], b"<p>x</p>")
        if case == "big-headers":  # under h11's limit, over the fetcher's 32 KiB default
            return _Reply(200, [("Content-Type", "text/html")] +
                          [(f"X-Filler-{i}", "x" * 1000) for i in range(48)], b"<p>x</p>")
        if case == "no-content-type":
            return _Reply(200, [], b"<html><body>no type</body></html>")
        if case == "octet-stream":
            return _Reply(200, [("Content-Type", "application/octet-stream")], os.urandom(2048))
        if case == "image":
            return _Reply(200, [("Content-Type", "image/png")], b"\x89PNG\r\n\x1a\n" + b"\0" * 64)
        if case == "binary-as-html":
            return _Reply(200, [("Content-Type", "text/html")],
                          b"\x7fELF\x02\x01\x01\x00" + bytes(range(256)) * 8)
        if case == "garbage":
            return _Reply(raw=b"SSH-2.0-OpenSSH_9.9\r\nProtocol mismatch.\r\n\x00\x01\x02")
        if case == "status":
            code = int(q.get("code", "500"))
            out = [("Content-Type", "text/html")]
            if "retry_after" in q:
                out.append(("Retry-After", q["retry_after"]))
            return _Reply(code, out, b"<p>status page</p>")
        if case == "flaky":  # 503 for the first ``fail`` requests of a token, then a page
            token = q.get("token", "x")
            self._counters[token] = self._counters.get(token, 0) + 1
            if self._counters[token] <= int(q.get("fail", "1")):
                return _Reply(503, [("Content-Type", "text/html"), ("Retry-After", "0")],
                              b"<p>busy</p>")
            return self._html("<p>recovered</p>")
        if case == "latin1":
            return _Reply(200, [("Content-Type", "text/html; charset=iso-8859-1")],
                          "<p>caf\u00e9 cr\u00e8me</p>".encode("latin-1"))
        if case == "meta-charset":
            return _Reply(200, [("Content-Type", "text/html")],
                          '<html><head><meta charset="windows-1251"></head><body>'
                          "\u043d\u043e\u0432\u043e\u0441\u0442\u0438</body></html>"
                          .encode("cp1251"))
        if case == "utf8-bom":
            return _Reply(200, [("Content-Type", "text/html; charset=iso-8859-1")],
                          b"\xef\xbb\xbf<p>\xe2\x9c\x93 checked</p>")
        if case == "bad-gzip":
            return _Reply(200, [("Content-Type", "text/html"), ("Content-Encoding", "gzip")],
                          b"\x1f\x8b\x08\x00not really gzip at all")
        if case == "brotli":
            return _Reply(200, [("Content-Type", "text/html"), ("Content-Encoding", "br")],
                          b"\x0b\x02\x80hello\x03")
        if case == "bad-charset":  # a codec that is not a character encoding
            return _Reply(200, [("Content-Type", "text/html; charset=base64")], b"<p>hi</p>")
        if case == "bad-location":
            return _Reply(302, [("Location", "http://[::1")])
        if case == "odd-retry-after":
            return _Reply(503, [("Content-Type", "text/html"), ("Retry-After", "\u00b2")],
                          b"<p>busy</p>")
        if case == "set-cookie":
            return _Reply(200, [("Content-Type", "text/html"),
                                ("Set-Cookie", "session=abc123; Path=/")], b"<p>cookie</p>")
        if case == "echo-headers":
            text = "".join(f"<li>{k}: {v}</li>" for k, v in sorted(headers.items()))
            return self._html(f"<ul>{text}</ul>")
        if case == "big-body":
            size = int(q.get("bytes", str(8 << 20)))
            return _Reply(200, [("Content-Type", "text/html")], b"<p>" + b"y" * size)
        return _Reply(404, [("Content-Type", "text/html")], b"<p>no such hostile case</p>")


class CountingListener:
    """A TCP listener that only counts connections (and closes them): the witness that a
    refused address was never reached. ``with CountingListener("127.0.0.2", port) as c``."""

    def __init__(self, host: str, port: int) -> None:
        import socket

        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.sock = socket.socket(family, socket.SOCK_STREAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind((host, port))
        self.sock.listen(64)
        self.sock.settimeout(0.2)
        self.count = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.sock.accept()
            except OSError:
                continue
            self.count += 1
            conn.close()

    def __enter__(self) -> CountingListener:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(2)
        self.sock.close()
