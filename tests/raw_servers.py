"""Byte-level hostile HTTP/1.1 servers on loopback, with a server-side byte counter.

Test fixtures only, kept out of the installed package. ``RawServer`` listens on 127.0.0.1
(ephemeral port), reads one request head per connection and plays a case by writing raw
bytes: endless 1xx responses, endless tiny chunks, huge chunk extensions, a header block
that never ends, robots.txt bombs, stalls, truncated gzip. Each ``Exchange`` records
``bytes_sent`` (bytes the socket accepted before the client hung up) and whether the client
hung up, which is how the tests see what the fetcher really read, whatever it reports.

The accepted sockets get a small ``SO_SNDBUF`` so kernel buffering does not hide how much
the client read: what the server managed to send is at most what the client read plus the
server's send buffer plus the client's receive queue (``SOCKET_SLACK`` bounds the two).

Bounded: every case stops by itself after ``max_exchange_bytes`` (64 MiB) or
``max_exchange_s`` (20 s), whichever comes first, or when the server stops.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import functools
import gzip
import select
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from urllib.parse import parse_qs, urlsplit

__all__ = [
    "CASE_PREFIX",
    "LoopTicker",
    "SNDBUF",
    "SOCKET_SLACK",
    "Exchange",
    "RawConnection",
    "RawRequest",
    "RawServer",
    "play_case",
    "robots_bomb_body",
]

CASE_PREFIX = "/_raw/"
SNDBUF = 16 << 10  # asked for; Linux doubles it (socket(7), SO_SNDBUF)
#: What a server may have handed to its socket beyond what the client read: the server's
#: send queue (2 x SNDBUF on Linux) plus the client's receive queue, which the fetcher
#: bounds with ``FetchPolicy.receive_buffer_bytes`` (128 KiB, doubled by Linux: 256 KiB).
#: Without that bound Linux auto-tunes the client's queue up to tcp_rmem's maximum (32 MiB
#: on this machine) and a run once saw 1.2 MB sent against a 500 KiB cap. 512 KiB leaves
#: room for both queues and is still far below what any unbounded case sends.
SOCKET_SLACK = 512 << 10
MAX_REQUEST_HEAD = 16 << 10
MAX_EXCHANGE_BYTES = 64 << 20
MAX_EXCHANGE_S = 20.0


@dataclass(frozen=True)
class RawRequest:
    """One request head as a case sees it; ``seen_before`` counts earlier requests of the
    same host and path on this server (a case can answer the first one differently)."""

    method: str
    target: str
    path: str
    query: dict[str, str]
    headers: dict[str, str]
    host: str
    seen_before: int = 0


@dataclass
class Exchange:
    """One connection's request and what the server did with it."""

    request: RawRequest | None = None
    bytes_sent: int = 0
    client_closed: bool = False  # the client hung up before the case finished
    ended_by: str = ""  # done, client-closed, byte-limit, time-limit, server-stopped, no-request
    started: float = field(default_factory=time.monotonic)
    seconds: float = 0.0
    done: threading.Event = field(default_factory=threading.Event)


class RawConnection:
    """The server side of one connection: counted, bounded writes."""

    def __init__(self, sock: socket.socket, exchange: Exchange, max_bytes: int,
                 max_seconds: float, stopping: threading.Event) -> None:
        self.sock = sock
        self.exchange = exchange
        self.max_bytes = max_bytes
        self.deadline = exchange.started + max_seconds
        self.stopping = stopping

    @property
    def ended(self) -> bool:
        return bool(self.exchange.ended_by)

    def _end(self, why: str) -> bool:
        if not self.exchange.ended_by:
            self.exchange.ended_by = why
            self.exchange.client_closed = why == "client-closed"
        return False

    def _check_bounds(self) -> bool:
        if self.ended:
            return False
        if self.stopping.is_set():
            return self._end("server-stopped")
        if time.monotonic() >= self.deadline:
            return self._end("time-limit")
        if self.exchange.bytes_sent >= self.max_bytes:
            return self._end("byte-limit")
        return True

    def send(self, data: bytes) -> bool:
        """Hand ``data`` to the socket, counting what it accepts; False once the client hung
        up or a bound was reached (nothing more should be sent then)."""
        view = memoryview(data)
        while view:
            if not self._check_bounds():
                return False
            room = self.max_bytes - self.exchange.bytes_sent
            self.sock.settimeout(max(0.01, min(0.2, self.deadline - time.monotonic())))
            try:
                n = self.sock.send(view[:room])
            except TimeoutError:
                continue  # the client is not reading; check the bounds again
            except OSError:  # EPIPE, ECONNRESET: the client hung up
                return self._end("client-closed")
            self.exchange.bytes_sent += n
            view = view[n:]
        return True

    def repeat(self, block: bytes) -> None:
        """Send ``block`` again and again until the client hangs up or a bound is reached."""
        while self.send(block):
            pass

    def pause(self, seconds: float) -> bool:
        """Wait ``seconds`` unless the client hangs up first; False if it did (or a bound
        was reached). Bytes the client sends meanwhile are read and dropped."""
        until = min(time.monotonic() + seconds, self.deadline)
        while self._check_bounds():
            left = until - time.monotonic()
            if left <= 0:
                return True
            readable, _, _ = select.select([self.sock], [], [], min(left, 0.1))
            if readable:
                try:
                    data = self.sock.recv(4096)
                except OSError:
                    return self._end("client-closed")
                if not data:
                    return self._end("client-closed")
        return False

    def hold(self) -> None:
        """Send nothing more and wait until the client hangs up (or a bound is reached)."""
        while self.pause(1.0):
            pass


Case = Callable[[RawRequest, RawConnection], None]


class RawServer:
    """``with RawServer() as server:`` serves ``play`` (default ``play_case``) on
    127.0.0.1, one thread per connection (at most ``max_connections`` at once), one request
    per connection. ``server.port``; ``server.exchanges`` lists every connection's record.
    """

    def __init__(self, play: Case | None = None, sndbuf: int = SNDBUF,
                 max_exchange_bytes: int = MAX_EXCHANGE_BYTES,
                 max_exchange_s: float = MAX_EXCHANGE_S, max_connections: int = 512) -> None:
        self.play = play or play_case
        self.sndbuf = sndbuf
        self.max_exchange_bytes = max_exchange_bytes
        self.max_exchange_s = max_exchange_s
        self.exchanges: list[Exchange] = []
        self._seen: dict[tuple[str, str], int] = {}
        self._lock = threading.Condition()
        self._active = 0
        self._slots = threading.BoundedSemaphore(max_connections)
        self._stopping = threading.Event()
        self._listener = socket.create_server(("127.0.0.1", 0), backlog=1024)
        self._listener.settimeout(0.1)
        self.port: int = self._listener.getsockname()[1]
        self._thread = threading.Thread(target=self._accept_loop, name="raw-server",
                                        daemon=True)

    # ------------------------------------------------------------------ lifecycle
    def __enter__(self) -> RawServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        """Stop accepting, end every case (each sees the stop within 0.2 s), and wait."""
        self._stopping.set()
        self._thread.join(5)
        self.settle(5)
        self._listener.close()

    def url(self, host: str, path: str = "/") -> str:
        return f"http://{host}:{self.port}{path}"

    # ------------------------------------------------------------------ records
    def settle(self, timeout: float = 5.0) -> bool:
        """Wait until no connection is being served (bounded); True if none is."""
        with self._lock:
            return self._lock.wait_for(lambda: self._active == 0, timeout)

    def requests(self, host: str | None = None, path: str | None = None) -> list[Exchange]:
        """The exchanges whose request matches ``host`` and ``path`` (None: any)."""
        with self._lock:
            found = list(self.exchanges)
        return [e for e in found if e.request is not None
                and (host is None or e.request.host == host)
                and (path is None or e.request.path == path)]

    def count(self, host: str | None = None, path: str | None = None) -> int:
        return len(self.requests(host, path))

    # ------------------------------------------------------------------ serving
    def _accept_loop(self) -> None:
        while not self._stopping.is_set():
            try:
                sock, _ = self._listener.accept()
            except OSError:  # the 0.1 s accept timeout, or the listener closed
                continue
            if not self._slots.acquire(timeout=5):
                sock.close()
                continue
            exchange = Exchange()
            with self._lock:
                self._active += 1
                if len(self.exchanges) < 100_000:
                    self.exchanges.append(exchange)
            threading.Thread(target=self._serve, args=(sock, exchange), daemon=True,
                             name="raw-server-conn").start()

    def _serve(self, sock: socket.socket, exchange: Exchange) -> None:
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, self.sndbuf)
            conn = RawConnection(sock, exchange, self.max_exchange_bytes, self.max_exchange_s,
                                 self._stopping)
            request = self._read_request(sock)
            if request is None:
                exchange.ended_by = "no-request"
                return
            with self._lock:
                key = (request.host, request.path)
                seen = self._seen.get(key, 0)
                self._seen[key] = seen + 1
                exchange.request = dataclasses.replace(request, seen_before=seen)
            self.play(exchange.request, conn)
            if not exchange.ended_by:
                exchange.ended_by = "done"
                _linger(sock)
        except Exception:  # noqa: BLE001 - a broken case must not kill the server thread
            exchange.ended_by = exchange.ended_by or "server-error"
        finally:
            exchange.seconds = time.monotonic() - exchange.started
            try:
                sock.close()
            finally:
                exchange.done.set()
                self._slots.release()
                with self._lock:
                    self._active -= 1
                    self._lock.notify_all()

    def _read_request(self, sock: socket.socket) -> RawRequest | None:
        sock.settimeout(10.0)
        head = b""
        try:
            while b"\r\n\r\n" not in head:
                if len(head) > MAX_REQUEST_HEAD or self._stopping.is_set():
                    return None
                data = sock.recv(4096)
                if not data:
                    return None
                head += data
        except OSError:
            return None
        lines = head.split(b"\r\n\r\n", 1)[0].decode("latin-1").split("\r\n")
        try:
            method, target, _version = lines[0].split(" ", 2)
        except ValueError:
            return None
        headers: dict[str, str] = {}
        for line in lines[1:]:
            name, sep, value = line.partition(":")
            if sep:
                headers[name.strip().lower()] = value.strip()
        parts = urlsplit(target)
        host = headers.get("host", "").rsplit(":", 1)[0].lower()
        query = {k: v[0] for k, v in parse_qs(parts.query).items()}
        return RawRequest(method, target, parts.path, query, headers, host)


def _linger(sock: socket.socket, seconds: float = 1.0) -> None:
    """Half-close, then wait (bounded) for the client's end: closing with unread bytes
    from the client would reset the connection and could cut off what it has not read."""
    try:
        sock.shutdown(socket.SHUT_WR)
        until = time.monotonic() + seconds
        while (left := until - time.monotonic()) > 0:
            readable, _, _ = select.select([sock], [], [], left)
            if readable and not sock.recv(4096):
                return
    except OSError:
        return


# ---------------------------------------------------------------------- the cases
def _head(status: str, headers: list[tuple[str, str]]) -> bytes:
    """A status line and header block; every response closes its connection."""
    lines = [f"HTTP/1.1 {status}", *(f"{k}: {v}" for k, v in headers), "Connection: close"]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1")


def page_html(note: str = "a plain small page") -> bytes:
    return (f"<html><head><title>ok</title></head><body><p>{note}</p></body></html>"
            .encode())


def send_page(conn: RawConnection, body: bytes, content_type: str = "text/html; charset=utf-8",
              extra: list[tuple[str, str]] | None = None) -> None:
    conn.send(_head("200 OK", [("Content-Type", content_type),
                               ("Content-Length", str(len(body))), *(extra or [])]) + body)


def continue_flood(req: RawRequest, conn: RawConnection) -> None:
    """``100 Continue`` forever, never a final response. RFC 9110 section 15.2: a client
    must accept any number of 1xx responses before the final one, so only a cap stops it."""
    conn.repeat(b"HTTP/1.1 100 Continue\r\n\r\n" * 256)


def early_hints_flood(req: RawRequest, conn: RawConnection) -> None:
    """``103 Early Hints`` (RFC 8297) with about 8 KiB of Link headers each, forever."""
    links = "".join(f"Link: </static/asset-{i:04d}.css>; rel=preload; as=style\r\n"
                    for i in range(160))
    conn.repeat(f"HTTP/1.1 103 Early Hints\r\n{links}\r\n".encode() * 4)


def tiny_chunks(req: RawRequest, conn: RawConnection) -> None:
    """A chunked body of 1-byte chunks forever: six bytes on the wire per body byte
    (RFC 9112 section 7.1: chunk-size CRLF chunk-data CRLF)."""
    if conn.send(_head("200 OK", [("Content-Type", "text/html"),
                                  ("Transfer-Encoding", "chunked")])):
        conn.repeat(b"1\r\nx\r\n" * 4096)


def chunk_extensions(req: RawRequest, conn: RawConnection) -> None:
    """1-byte chunks whose chunk-size lines carry a 4 KiB chunk extension each, forever
    (RFC 9112 section 7.1.1: chunk-ext = *( BWS ";" BWS chunk-ext-name [ "=" ... ] ))."""
    size = int(req.query.get("ext", "4096"))
    chunk = b"1;ext=" + b"a" * size + b"\r\nx\r\n"
    if conn.send(_head("200 OK", [("Content-Type", "text/html"),
                                  ("Transfer-Encoding", "chunked")])):
        conn.repeat(chunk * max(1, (64 << 10) // len(chunk)))


def endless_header_fold(req: RawRequest, conn: RawConnection) -> None:
    """Good headers for a small body, then one header continued forever by obs-fold lines
    (RFC 9112 section 5.2: a line starting with SP or HTAB continues the field before it),
    so the header block never ends."""
    body = page_html()
    head = (b"HTTP/1.1 200 OK\r\nContent-Type: text/html\r\nContent-Length: %d\r\n"
            b"X-Folded: start\r\n" % len(body))
    if conn.send(head):
        conn.repeat(b" " + b"f" * 1000 + b"\r\n")


def endless_header_lines(req: RawRequest, conn: RawConnection) -> None:
    """Good headers for a small body, then new header fields forever (each under 1 KiB)."""
    head = b"HTTP/1.1 200 OK\r\nContent-Type: text/html\r\nContent-Length: 10\r\n"
    if conn.send(head):
        conn.repeat(b"".join(b"X-Filler-%04d: %s\r\n" % (i, b"h" * 900) for i in range(16)))


def trickle(req: RawRequest, conn: RawConnection) -> None:
    """A chunked body that sends one byte every ``gap`` seconds (default 0.5)."""
    gap = float(req.query.get("gap", "0.5"))
    if conn.send(_head("200 OK", [("Content-Type", "text/html"),
                                  ("Transfer-Encoding", "chunked")])):
        while conn.send(b"1\r\na\r\n") and conn.pause(gap):
            pass


def slow_head(req: RawRequest, conn: RawConnection) -> None:
    """The response head one byte every ``gap`` seconds (default 0.5)."""
    gap = float(req.query.get("gap", "0.5"))
    for byte in _head("200 OK", [("Content-Type", "text/html"), ("Content-Length", "4")]):
        if not (conn.send(bytes([byte])) and conn.pause(gap)):
            return
    conn.send(b"<p/>")


def padded_redirect(req: RawRequest, conn: RawConnection) -> None:
    """A chain of ``n`` redirects whose heads carry ``pad`` bytes of extra header fields
    each, ending in a page of ``body`` bytes (RFC 9110 section 15.4.3: 302 Found)."""
    n = int(req.query.get("n", "0"))
    pad = int(req.query.get("pad", "0"))
    size = int(req.query.get("body", "1000"))
    fillers = [(f"X-Pad-{i:03d}", "p" * 900) for i in range(pad // 916)]
    if n > 0:
        location = f"{CASE_PREFIX}padded-redirect?n={n - 1}&pad={pad}&body={size}"
        conn.send(_head("302 Found", [("Location", location), ("Content-Length", "0"),
                                      *fillers]))
        return
    send_page(conn, b"<p>" + b"y" * max(0, size - 3), "text/html", fillers)


@functools.cache
def _gzip_bomb_page() -> bytes:
    """64 MiB of HTML text, gzip-compressed to about 64 KiB."""
    return gzip.compress(b"<p>" + b"a" * (64 << 20), compresslevel=9)


def gzip_bomb(req: RawRequest, conn: RawConnection) -> None:
    """A page that decodes 1000-fold: 64 KiB of gzip, 64 MiB of text."""
    send_page(conn, _gzip_bomb_page(), "text/html", [("Content-Encoding", "gzip")])


@functools.cache
def _text_page_gzip() -> tuple[bytes, bytes]:
    """(page, its gzip): a page of varied text, so the gzip stream is tens of KiB."""
    words = [f"word{i * 7919 % 10007}" for i in range(20000)]
    page = ("<html><body><p>" + " ".join(words) + "</p></body></html>").encode()
    return page, gzip.compress(page, compresslevel=6)


def truncated_gzip(req: RawRequest, conn: RawConnection) -> None:
    """A gzip page cut in the middle of its stream. ``framing`` chooses how the HTTP message
    ends: ``length`` (a Content-Length for the cut bytes: a complete message), ``chunked``
    (the cut bytes, then the last chunk), ``close`` (no length; the end of the connection
    ends the body, RFC 9112 section 6.3 rule 8) or ``broken`` (a Content-Length for the
    whole stream, then the connection drops halfway). In every one the gzip member lacks
    its end (RFC 1952 section 2.3: the deflate data, then CRC32 and ISIZE)."""
    _, full = _text_page_gzip()
    cut = full[: len(full) // 2]
    framing = req.query.get("framing", "length")
    headers = [("Content-Type", "text/html"), ("Content-Encoding", "gzip")]
    if framing == "chunked":
        conn.send(_head("200 OK", [*headers, ("Transfer-Encoding", "chunked")]) +
                  b"%x\r\n%s\r\n0\r\n\r\n" % (len(cut), cut))
    elif framing == "close":
        conn.send(_head("200 OK", headers) + cut)
    elif framing == "broken":
        conn.send(_head("200 OK", [*headers, ("Content-Length", str(len(full)))]) + cut)
    else:
        conn.send(_head("200 OK", [*headers, ("Content-Length", str(len(cut)))]) + cut)


def whole_gzip(req: RawRequest, conn: RawConnection) -> None:
    """The same page as ``truncated_gzip``, whole: the control case."""
    _, full = _text_page_gzip()
    send_page(conn, full, "text/html", [("Content-Encoding", "gzip")])


# ---------------------------------------------------------------------- robots.txt
ROBOTS_FILLER = b"Disallow: /x123/\n"
ROBOTS_LATE_OFFSET = 1 << 20  # where robots_bomb_body puts its "Disallow: /late/"


def robots_bomb_body(size: int) -> bytes:
    """``size`` bytes of valid robots.txt (RFC 9309 section 2.2): a group for every agent
    that disallows ``/early/`` at the top, ``/x123/`` again and again, and ``/late/`` at
    1 MiB, past the 500 KiB a parser must read (RFC 9309 section 2.5)."""
    head = b"User-agent: *\nDisallow: /early/\n"
    early = head + ROBOTS_FILLER * ((ROBOTS_LATE_OFFSET - len(head)) // len(ROBOTS_FILLER))
    rest = b"Disallow: /late/\n"
    rest += ROBOTS_FILLER * (max(0, size - len(early) - len(rest)) // len(ROBOTS_FILLER))
    return early + rest


@functools.cache
def robots_gzip_bomb_bytes(size: int = 16 << 20) -> bytes:
    """``robots_bomb_body(size)`` gzip-compressed (about 400-fold: 16 MiB in ~40 KiB)."""
    return gzip.compress(robots_bomb_body(size), compresslevel=9)


def robots_gzip_bomb(req: RawRequest, conn: RawConnection) -> None:
    """robots.txt served gzip-compressed: a few KiB on the wire, many MiB of rules."""
    send_page(conn, robots_gzip_bomb_bytes(), "text/plain", [("Content-Encoding", "gzip")])


def robots_endless(req: RawRequest, conn: RawConnection) -> None:
    """robots.txt with no length that never ends: the bomb's lines, then filler forever
    (the body ends only with the connection, RFC 9112 section 6.3 rule 8)."""
    if (conn.send(_head("200 OK", [("Content-Type", "text/plain")]))
            and conn.send(robots_bomb_body(ROBOTS_LATE_OFFSET + (64 << 10)))):
        conn.repeat(ROBOTS_FILLER * 4096)


def robots_stall(req: RawRequest, conn: RawConnection) -> None:
    """The first robots.txt request of a host gets its headers and then nothing, until the
    client hangs up; later ones get rules that allow everything."""
    if req.seen_before == 0:
        if conn.send(_head("200 OK", [("Content-Type", "text/plain"),
                                      ("Content-Length", "1000")])):
            conn.hold()
        return
    body = b"User-agent: *\nAllow: /\n"
    send_page(conn, body, "text/plain")


CASES: dict[str, Case] = {
    "continue-flood": continue_flood,
    "early-hints-flood": early_hints_flood,
    "tiny-chunks": tiny_chunks,
    "chunk-extensions": chunk_extensions,
    "endless-header-fold": endless_header_fold,
    "endless-header-lines": endless_header_lines,
    "trickle": trickle,
    "slow-head": slow_head,
    "gzip-bomb": gzip_bomb,
    "padded-redirect": padded_redirect,
    "truncated-gzip": truncated_gzip,
    "whole-gzip": whole_gzip,
}

#: robots.txt by host name prefix; any other host has none (404: no rules, RFC 9309
#: section 2.3.1.3)
ROBOTS_CASES: dict[str, Case] = {
    "robots-gzip-bomb": robots_gzip_bomb,
    "robots-endless": robots_endless,
    "robots-stall": robots_stall,
}


def play_case(req: RawRequest, conn: RawConnection) -> None:
    """The default play: ``/_raw/<case>`` runs a case, ``/robots.txt`` the host's robots
    case (by the first label of its name), any other path a small page."""
    if req.path == "/robots.txt":
        label = req.host.split(".", 1)[0]
        for prefix, case in ROBOTS_CASES.items():
            if label.startswith(prefix):
                case(req, conn)
                return
        body = b"no robots.txt here"
        conn.send(_head("404 Not Found", [("Content-Type", "text/plain"),
                                          ("Content-Length", str(len(body)))]) + body)
        return
    if req.path.startswith(CASE_PREFIX):
        case = CASES.get(req.path[len(CASE_PREFIX):])
        if case is not None:
            case(req, conn)
            return
    send_page(conn, page_html(f"page {req.path}"))



class LoopTicker:
    """Measures how long the running event loop was kept from a task that sleeps
    ``interval_s`` again and again: ``worst_gap_s`` is the largest time between two of its
    wakeups (``interval_s`` when the loop is never stalled).
    ``sample`` (optional) is called on every wakeup, e.g. to read the process's RSS.
    Use as ``async with LoopTicker() as ticker: ...``."""

    def __init__(self, interval_s: float = 0.01,
                 sample: Callable[[], None] | None = None) -> None:
        self.interval_s = interval_s
        self.sample = sample
        self.worst_gap_s = 0.0
        self.ticks = 0
        self._task: asyncio.Task[None] | None = None

    async def _run(self) -> None:
        while True:
            before = time.perf_counter()
            await asyncio.sleep(self.interval_s)
            self.worst_gap_s = max(self.worst_gap_s, time.perf_counter() - before)
            self.ticks += 1
            if self.sample is not None:
                self.sample()

    async def __aenter__(self) -> LoopTicker:
        self._task = asyncio.create_task(self._run())
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
