"""A transport that connects only to the address the fetcher checked.

httpx has no DNS hook: a plain transport resolves the host again when it connects, so an
answer that changes between our check and the connect (DNS rebinding) would slip past the
guard. Here the fetcher sets a pin (host, port, address) for the current task before each
request, and the network backend connects to that address, or refuses. TLS still runs
against the host name (SNI and certificate checks), since httpcore passes the origin's host
as ``server_hostname``.

Public API only: ``PinnedTransport`` is an ``httpx.AsyncBaseTransport`` that sends through
its own ``httpcore.AsyncConnectionPool`` (HTTP/1.1, no proxy, no environment settings),
whose network backend is ``PinnedBackend`` around the public ``httpcore.AnyIOBackend``
(httpcore 1.0; needs anyio, which httpx depends on). httpcore's exceptions are raised as
the matching public httpx exceptions, the httpcore one kept as ``__cause__``, as
``httpx.AsyncHTTPTransport`` does. Written against httpx 0.27-0.29 and httpcore 1.0;
``tests/test_fetch_hostile.py`` proves the pin holds.

Every stream the backend opens counts its reads (``wire.CountingStream``), so the fetcher's
byte caps hold for what really crosses the socket. Connections are pooled per origin and checked
address: a keep-alive connection is reused only for a request pinned to the same address,
so an origin whose DNS answer changed between two fetches never rides on the old socket.
"""

from __future__ import annotations

import contextlib
import contextvars
import ssl
import typing
from collections import OrderedDict
from collections.abc import AsyncIterator, Iterator
from dataclasses import dataclass

import httpcore
import httpx

from cascade.fetch.wire import CountingStream

__all__ = ["Pin", "PinnedBackend", "PinnedTransport", "pinned", "unpin"]

_PIN: contextvars.ContextVar[Pin | None] = contextvars.ContextVar("cascade_fetch_pin",
                                                                  default=None)

# httpcore exception -> public httpx exception; a subclass comes before its base, so the
# first match is the most specific (the same pairs as httpx's own transport uses)
_HTTPCORE_TO_HTTPX: tuple[tuple[type[Exception], type[httpx.TransportError]], ...] = (
    (httpcore.ConnectTimeout, httpx.ConnectTimeout),
    (httpcore.ReadTimeout, httpx.ReadTimeout),
    (httpcore.WriteTimeout, httpx.WriteTimeout),
    (httpcore.PoolTimeout, httpx.PoolTimeout),
    (httpcore.TimeoutException, httpx.TimeoutException),
    (httpcore.ConnectError, httpx.ConnectError),
    (httpcore.ReadError, httpx.ReadError),
    (httpcore.WriteError, httpx.WriteError),
    (httpcore.NetworkError, httpx.NetworkError),
    (httpcore.ProxyError, httpx.ProxyError),
    (httpcore.UnsupportedProtocol, httpx.UnsupportedProtocol),
    (httpcore.LocalProtocolError, httpx.LocalProtocolError),
    (httpcore.RemoteProtocolError, httpx.RemoteProtocolError),
    (httpcore.ProtocolError, httpx.ProtocolError),
)


@contextlib.contextmanager
def _httpx_errors() -> Iterator[None]:
    """Raise an httpcore exception as the matching httpx one (the original as its cause)."""
    try:
        yield
    except Exception as exc:
        for core_type, httpx_type in _HTTPCORE_TO_HTTPX:
            if isinstance(exc, core_type):
                raise httpx_type(str(exc)) from exc
        raise


@dataclass(frozen=True)
class Pin:
    host: str
    port: int
    address: str


class PinnedBackend(httpcore.AsyncNetworkBackend):
    """Connects to the pinned address of the current task; any other connect is refused."""

    def __init__(self) -> None:
        self._backend = httpcore.AnyIOBackend()
        self.connects: list[tuple[str, int, str]] = []  # (host, port, address), for tests

    async def connect_tcp(
        self,
        host: str,
        port: int,
        timeout: float | None = None,
        local_address: str | None = None,
        socket_options: typing.Iterable[typing.Any] | None = None,
    ) -> httpcore.AsyncNetworkStream:
        pin = _PIN.get()
        if pin is None or pin.host != host.lower() or pin.port != port:
            raise httpcore.ConnectError(f"refused: no checked address for {host}:{port}")
        if len(self.connects) < 10_000:
            self.connects.append((host, port, pin.address))
        stream = await self._backend.connect_tcp(pin.address, port, timeout=timeout,
                                                 local_address=local_address,
                                                 socket_options=socket_options)
        return CountingStream(stream)

    async def connect_unix_socket(self, path: str, timeout: float | None = None,
                                  socket_options: typing.Any = None
                                  ) -> httpcore.AsyncNetworkStream:
        raise httpcore.ConnectError("refused: unix sockets are never used by the fetcher")

    async def sleep(self, seconds: float) -> None:
        await self._backend.sleep(seconds)


class _ResponseStream(httpx.AsyncByteStream):
    """The body of an httpcore response, with httpcore errors raised as httpx ones;
    ``on_close`` runs once when it is closed."""

    def __init__(self, stream: typing.AsyncIterable[bytes],
                 on_close: typing.Callable[[], None] | None = None) -> None:
        self._stream = stream
        self._on_close = on_close

    async def __aiter__(self) -> AsyncIterator[bytes]:
        with _httpx_errors():
            async for chunk in self._stream:
                yield chunk

    async def aclose(self) -> None:
        close = getattr(self._stream, "aclose", None)
        try:
            if close is not None:
                with _httpx_errors():
                    await close()
        finally:
            if self._on_close is not None:
                self._on_close()
                self._on_close = None


class PinnedTransport(httpx.AsyncBaseTransport):
    """An httpx transport whose connection pools connect through ``PinnedBackend``, one
    pool per origin and checked address (at most ``max_pools`` idle ones kept, least
    recently used closed first);
    no proxy, no environment settings, HTTP/1.1. ``backend.connects`` records each
    connect, for tests."""

    def __init__(self, limits: httpx.Limits, ssl_context: ssl.SSLContext | None = None,
                 max_pools: int = 256,
                 socket_options: typing.Sequence[tuple[int, int, int]] = ()) -> None:
        from cascade.fetch.tls import sandbox_ssl_context

        self.backend = PinnedBackend()
        self._limits = limits
        self._ssl_context = ssl_context or sandbox_ssl_context()
        self._max_pools = max_pools
        self._socket_options = list(socket_options)
        self._pools: OrderedDict[str, httpcore.AsyncConnectionPool] = OrderedDict()
        self._in_use: dict[str, int] = {}

    def _pool_for(self, address: str) -> httpcore.AsyncConnectionPool:
        pool = self._pools.get(address)
        if pool is None:
            pool = httpcore.AsyncConnectionPool(
                ssl_context=self._ssl_context,
                max_connections=self._limits.max_connections,
                max_keepalive_connections=self._limits.max_keepalive_connections,
                keepalive_expiry=self._limits.keepalive_expiry,
                http1=True,
                http2=False,
                network_backend=self.backend,
                socket_options=self._socket_options or None,
            )
            self._pools[address] = pool
        self._pools.move_to_end(address)
        return pool

    async def _evict(self) -> None:
        """Close the least recently used idle pools beyond ``max_pools``. The pools are
        taken out first and closed after, so other tasks never see a half-evicted map."""
        idle = []
        for address in list(self._pools):
            if len(self._pools) <= self._max_pools:
                break
            if self._in_use.get(address, 0) == 0:
                idle.append(self._pools.pop(address))
        for pool in idle:
            await pool.aclose()

    async def handle_async_request(self, request: httpx.Request) -> httpx.Response:
        """Send ``request`` over the pinned address's pool; the body is left to stream."""
        pin = _PIN.get()
        # one pool per origin and checked address: a connection is only ever reused for
        # its own origin, and small pools keep httpcore's per-request bookkeeping (linear
        # in the pool's connections) short when many hosts share one address
        address = (f"{request.url.raw_scheme.decode()}://{request.url.raw_host.decode()}:"
                   f"{request.url.port}@{pin.address if pin is not None else ''}")
        core_request = httpcore.Request(
            method=request.method,
            url=httpcore.URL(scheme=request.url.raw_scheme, host=request.url.raw_host,
                             port=request.url.port, target=request.url.raw_path),
            headers=request.headers.raw,
            content=request.stream,  # type: ignore[arg-type]
            extensions=request.extensions,
        )
        pool = self._pool_for(address)
        self._in_use[address] = self._in_use.get(address, 0) + 1
        try:
            with _httpx_errors():
                core_response = await pool.handle_async_request(core_request)
        except BaseException:
            self._release(address)
            raise
        await self._evict()
        return httpx.Response(
            status_code=core_response.status,
            headers=core_response.headers,
            stream=_ResponseStream(core_response.stream,  # type: ignore[arg-type]
                                   lambda: self._release(address)),
            extensions=core_response.extensions,
            request=request,
        )

    def _release(self, address: str) -> None:
        left = self._in_use.get(address, 0) - 1
        if left > 0:
            self._in_use[address] = left
        else:
            self._in_use.pop(address, None)

    async def aclose(self) -> None:
        pools, self._pools = list(self._pools.values()), OrderedDict()
        for pool in pools:
            await pool.aclose()


def pinned(host: str, port: int, address: str) -> contextvars.Token:
    """Pin the current task's next connection to ``address``; reset with ``unpin``."""
    return _PIN.set(Pin(host.lower(), port, address))


def unpin(token: contextvars.Token) -> None:
    """Undo the ``pinned`` call that returned ``token``."""
    _PIN.reset(token)
