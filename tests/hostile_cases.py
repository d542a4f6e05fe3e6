"""The worst corners of the web, served by the loopback ``SiteFarm`` for the fetcher tests.

Test fixtures only, kept out of the installed package: ``HostileSiteFarm`` is a
``SiteFarm`` whose extra routes answer ``/_hostile/<case>`` (bombs, endless and trickled
bodies, huge headers, garbage, odd statuses and charsets) and give the hosts
``robots-deny.``, ``robots-partial.``, ``robots-slow.`` and ``robots-5xx.`` their own
robots.txt. ``CountingListener`` is the witness that a refused address was never reached.
Bounded: every endless or slow response stops by itself within a minute.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import os
import socket
import ssl
import threading
from collections.abc import Iterable, Iterator
from urllib.parse import unquote

from cascade.scenario.site_farm import FarmRequest, Reply, SiteFarm
from cascade.scenario.telemetry import TelemetryRecord

HOSTILE_PREFIX = "/_hostile/"
BOMB_SIZE = 64 << 20  # decoded size of the compression bombs


def _bomb(layers: int) -> bytes:
    data = b"\0" * BOMB_SIZE
    for _ in range(layers):
        data = gzip.compress(data, compresslevel=9)
    return data


def _html(text: str = "<p>A plain small page for the hostile suite.</p>") -> Reply:
    return Reply(200, [("Content-Type", "text/html; charset=utf-8")],
                 f"<html><head><title>ok</title></head><body>{text}</body></html>".encode())


async def hostile_robots(request: FarmRequest) -> Reply | None:
    """robots.txt for the ``robots-*`` test hosts; None (the farm's own) for any other."""
    host = request.host
    if request.path != "/robots.txt":
        return None
    if host.startswith("robots-deny."):
        return Reply(200, [("Content-Type", "text/plain")], b"User-agent: *\nDisallow: /\n")
    if host.startswith("robots-partial."):
        return Reply(200, [("Content-Type", "text/plain")],
                     b"User-agent: *\nDisallow: /private/\n")
    if host.startswith("robots-slow."):
        await asyncio.sleep(30)
        return Reply(200, [("Content-Type", "text/plain")], b"User-agent: *\nAllow: /\n")
    if host.startswith("robots-5xx."):
        return Reply(503, [("Content-Type", "text/plain")], b"busy")
    return None


class HostileCases:
    """The ``/_hostile/<case>`` route; keeps the state of the cases that need some (the
    compression bombs, built once; the per-token counters of ``flaky``)."""

    def __init__(self) -> None:
        self._bombs: dict[int, bytes] = {}
        self._counters: dict[str, int] = {}

    async def __call__(self, request: FarmRequest) -> Reply:
        case = request.path[len(HOSTILE_PREFIX):]
        q = {k: v[0] for k, v in request.query.items()}
        if case == "page":
            return _html()
        if case == "redirect":
            return Reply(302, [("Location", unquote(q.get("to", "/")))])
        if case == "redirect-loop":
            return Reply(302, [("Location", "/_hostile/redirect-loop")])
        if case.startswith("chain/"):
            n = int(case.split("/", 1)[1])
            if n <= 0:
                return _html("<p>end of the chain</p>")
            return Reply(301, [("Location", f"/_hostile/chain/{n - 1}")])
        if case in ("gzip-bomb", "nested-bomb", "triple-gzip"):
            layers = {"gzip-bomb": 1, "nested-bomb": 2, "triple-gzip": 3}[case]
            if layers not in self._bombs:
                self._bombs[layers] = await asyncio.to_thread(_bomb, layers)
            return Reply(200, [("Content-Type", "text/html"),
                               ("Content-Encoding", ", ".join(["gzip"] * layers))],
                         self._bombs[layers])
        if case == "endless":
            async def endless(writer: asyncio.StreamWriter) -> None:
                chunk = b"<p>" + b"more text " * 800 + b"</p>"
                frame = f"{len(chunk):x}\r\n".encode() + chunk + b"\r\n"
                for _ in range(20_000):  # about 160 MB at most, then it stops by itself
                    writer.write(frame)
                    await writer.drain()
            return Reply(200, [("Content-Type", "text/html")], stream=endless)
        if case == "trickle":
            async def trickle(writer: asyncio.StreamWriter) -> None:
                for _ in range(60):  # one byte a second for at most a minute
                    writer.write(b"1\r\na\r\n")
                    await writer.drain()
                    await asyncio.sleep(1.0)
            return Reply(200, [("Content-Type", "text/html")], stream=trickle)
        if case == "slow-headers":
            await asyncio.sleep(float(q.get("s", "30")))
            return _html()
        if case == "huge-headers":  # past h11's own 100 KiB limit on a response head
            return Reply(200, [("Content-Type", "text/html")] +
                         [(f"X-Filler-{i}", "x" * 1000) for i in range(200)], b"<p>x</p>")
        if case == "big-headers":  # under h11's limit, over the fetcher's 32 KiB default
            return Reply(200, [("Content-Type", "text/html")] +
                         [(f"X-Filler-{i}", "x" * 1000) for i in range(48)], b"<p>x</p>")
        if case == "no-content-type":
            return Reply(200, [], b"<html><body>no type</body></html>")
        if case == "octet-stream":
            return Reply(200, [("Content-Type", "application/octet-stream")], os.urandom(2048))
        if case == "image":
            return Reply(200, [("Content-Type", "image/png")], b"\x89PNG\r\n\x1a\n" + b"\0" * 64)
        if case == "binary-as-html":
            return Reply(200, [("Content-Type", "text/html")],
                         b"\x7fELF\x02\x01\x01\x00" + bytes(range(256)) * 8)
        if case == "garbage":
            return Reply(raw=b"SSH-2.0-OpenSSH_9.9\r\nProtocol mismatch.\r\n\x00\x01\x02")
        if case == "status":
            code = int(q.get("code", "500"))
            out = [("Content-Type", "text/html")]
            if "retry_after" in q:
                out.append(("Retry-After", q["retry_after"]))
            return Reply(code, out, b"<p>status page</p>")
        if case == "flaky":  # 503 for the first ``fail`` requests of a token, then a page
            token = q.get("token", "x")
            self._counters[token] = self._counters.get(token, 0) + 1
            if self._counters[token] <= int(q.get("fail", "1")):
                return Reply(503, [("Content-Type", "text/html"), ("Retry-After", "0")],
                             b"<p>busy</p>")
            return _html("<p>recovered</p>")
        if case == "latin1":
            return Reply(200, [("Content-Type", "text/html; charset=iso-8859-1")],
                         "<p>caf\u00e9 cr\u00e8me</p>".encode("latin-1"))
        if case == "meta-charset":
            return Reply(200, [("Content-Type", "text/html")],
                         '<html><head><meta charset="windows-1251"></head><body>'
                         "\u043d\u043e\u0432\u043e\u0441\u0442\u0438</body></html>"
                         .encode("cp1251"))
        if case == "utf8-bom":
            return Reply(200, [("Content-Type", "text/html; charset=iso-8859-1")],
                         b"\xef\xbb\xbf<p>\xe2\x9c\x93 checked</p>")
        if case == "bad-gzip":
            return Reply(200, [("Content-Type", "text/html"), ("Content-Encoding", "gzip")],
                         b"\x1f\x8b\x08\x00not really gzip at all")
        if case == "brotli":
            return Reply(200, [("Content-Type", "text/html"), ("Content-Encoding", "br")],
                         b"\x0b\x02\x80hello\x03")
        if case == "bad-charset":  # a codec that is not a character encoding
            return Reply(200, [("Content-Type", "text/html; charset=base64")], b"<p>hi</p>")
        if case == "bad-location":
            return Reply(302, [("Location", "http://[::1")])
        if case == "odd-retry-after":
            return Reply(503, [("Content-Type", "text/html"), ("Retry-After", "\u00b2")],
                         b"<p>busy</p>")
        if case == "set-cookie":
            return Reply(200, [("Content-Type", "text/html"),
                               ("Set-Cookie", "session=abc123; Path=/")], b"<p>cookie</p>")
        if case == "echo-headers":
            text = "".join(f"<li>{k}: {v}</li>" for k, v in sorted(request.headers.items()))
            return _html(f"<ul>{text}</ul>")
        if case == "big-body":
            size = int(q.get("bytes", str(8 << 20)))
            return Reply(200, [("Content-Type", "text/html")], b"<p>" + b"y" * size)
        return Reply(404, [("Content-Type", "text/html")], b"<p>no such hostile case</p>")


class HostileSiteFarm(SiteFarm):
    """A ``SiteFarm`` that also serves the hostile cases and the ``robots-*`` hosts."""

    def __init__(self, records: Iterable[TelemetryRecord] = (), **kwargs) -> None:
        routes = {HOSTILE_PREFIX: HostileCases(), "/robots.txt": hostile_robots}
        routes.update(kwargs.pop("extra_routes", None) or {})
        super().__init__(records, extra_routes=routes, **kwargs)


class CountingListener:
    """A TCP listener that only counts connections (and closes them): the witness that a
    refused address was never reached. ``with CountingListener("127.0.0.2", port) as c``."""

    def __init__(self, host: str, port: int) -> None:
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


@contextlib.contextmanager
def tls_page_server(server_ctx: ssl.SSLContext, read_timeout_s: float = 5.0) -> Iterator[int]:
    """A one-page HTTPS server on 127.0.0.1 with ``server_ctx``'s certificate; yields its
    port. Handshakes the client refuses are ignored; the accept loop polls a stop event."""
    listener = socket.create_server(("127.0.0.1", 0))
    stop = threading.Event()

    def serve() -> None:
        listener.settimeout(0.2)  # a bounded poll of the stop event
        while not stop.is_set():
            try:
                conn, _ = listener.accept()
            except OSError:
                continue
            try:
                with server_ctx.wrap_socket(conn, server_side=True) as tls:
                    tls.settimeout(read_timeout_s)
                    tls.recv(65536)
                    body = b"<p>secure page</p>"
                    tls.sendall(b"HTTP/1.1 200 OK\r\nContent-Type: text/html\r\n"
                                b"Content-Length: %d\r\nConnection: close\r\n\r\n%s"
                                % (len(body), body))
            except (ssl.SSLError, OSError):
                pass

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield listener.getsockname()[1]
    finally:
        stop.set()
        thread.join(5)
        listener.close()
