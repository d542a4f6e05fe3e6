"""A transport that connects only to the address the fetcher checked.

httpx has no DNS hook: a plain transport resolves the host again when it connects, so an
answer that changes between our check and the connect (DNS rebinding) would slip past the
guard. Here the fetcher sets a pin (host, port, address) for the current task before each
request, and the network backend connects to that address, or refuses. TLS still runs
against the host name (SNI and certificate checks), since httpcore passes the origin's host
as ``server_hostname``.

Relies on ``httpx.AsyncHTTPTransport`` sending through ``self._pool`` (httpx 0.27-0.28);
``tests/test_fetch_hostile.py`` proves the pin holds, so a change there fails loudly.
"""

from __future__ import annotations

import contextvars
import ssl
import typing
from dataclasses import dataclass

import httpcore
import httpx
from httpcore._backends.auto import AutoBackend

_PIN: contextvars.ContextVar[Pin | None] = contextvars.ContextVar("cascade_fetch_pin",
                                                                  default=None)


@dataclass(frozen=True)
class Pin:
    host: str
    port: int
    address: str


class PinnedBackend(httpcore.AsyncNetworkBackend):
    """Connects to the pinned address of the current task; any other connect is refused."""

    def __init__(self) -> None:
        self._backend = AutoBackend()
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
        return await self._backend.connect_tcp(pin.address, port, timeout=timeout,
                                               local_address=local_address,
                                               socket_options=socket_options)

    async def connect_unix_socket(self, path: str, timeout: float | None = None,
                                  socket_options: typing.Any = None
                                  ) -> httpcore.AsyncNetworkStream:
        raise httpcore.ConnectError("refused: unix sockets are never used by the fetcher")

    async def sleep(self, seconds: float) -> None:
        await self._backend.sleep(seconds)


class PinnedTransport(httpx.AsyncHTTPTransport):
    """``httpx.AsyncHTTPTransport`` whose pool connects through ``PinnedBackend``;
    no proxy, no environment settings, HTTP/1.1."""

    def __init__(self, limits: httpx.Limits, ssl_context: ssl.SSLContext | None = None) -> None:
        super().__init__(limits=limits, trust_env=False)
        self.backend = PinnedBackend()
        self._pool = httpcore.AsyncConnectionPool(
            ssl_context=ssl_context or httpx.create_ssl_context(trust_env=False),
            max_connections=limits.max_connections,
            max_keepalive_connections=limits.max_keepalive_connections,
            keepalive_expiry=limits.keepalive_expiry,
            http1=True,
            http2=False,
            network_backend=self.backend,
        )


def pinned(host: str, port: int, address: str) -> contextvars.Token:
    """Pin the current task's next connection to ``address``; reset with ``unpin``."""
    return _PIN.set(Pin(host.lower(), port, address))


def unpin(token: contextvars.Token) -> None:
    _PIN.reset(token)
