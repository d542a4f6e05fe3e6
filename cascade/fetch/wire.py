"""Counting every byte read off the socket, against the fetch's caps.

httpx and httpcore hand the fetcher bodies after transfer coding is undone, so chunk-size
lines, chunk extensions and informational (1xx) responses never show up in a body count:
a server could stream gigabytes that never become body text. So the network stream itself
counts: every ``read`` adds its bytes to the ``WireMeter`` of the task that reads (set per
fetch, per robots.txt load, through a context variable, so a pooled connection counts
against whichever fetch is using it), and a read that passes a cap raises at once, which
makes httpcore drop the connection.

Two caps: ``limit`` for everything a fetch reads (all hops, headers, framing, body), and a
header-phase cap per hop (bytes before the final response's header block ends: bounds the
number and size of 1xx responses).
"""

from __future__ import annotations

import contextvars
import typing

import httpcore

__all__ = ["CountingStream", "WireCapExceeded", "WireMeter", "metering"]


class WireCapExceeded(httpcore.ReadError):
    """A read passed a wire cap; the connection is dropped (internal signal)."""


class WireMeter:
    """Bytes one fetch has read off the wire, and the caps they must stay under."""

    def __init__(self, limit: int) -> None:
        self.limit = int(limit)
        self.read = 0
        self.exceeded: str | None = None  # which cap was passed, once one was
        self._phase_end: int | None = None
        self._phase_name = ""
        self._phase_at_read = False

    def start_phase(self, allowance: int, name: str, at_read: bool = False) -> None:
        """From now on at most ``allowance`` more bytes until ``end_phase``.

        With ``at_read`` the phase is checked when a new read starts rather than on the
        bytes a read returns: for a response head, whose last read may also carry the
        start of the body, a read asked for after ``allowance`` bytes means the head
        (with any 1xx responses before it) is over its cap. Reads are sized so that the
        overshoot is one byte."""
        self._phase_end = self.read + int(allowance)
        self._phase_name = name
        self._phase_at_read = at_read

    def end_phase(self) -> None:
        self._phase_end = None

    def _fail(self, why: str) -> None:
        self.exceeded = why
        raise WireCapExceeded(why)

    def before_read(self, max_bytes: int) -> int:
        """How many bytes the next read may ask for; raises if the phase is already over."""
        if self._phase_end is not None and self._phase_at_read and \
                self.read >= self._phase_end:
            self._fail(f"{self._phase_name} over its cap")
        room = self.limit - self.read + 1  # one byte more, to see a cap passed
        if self._phase_end is not None:  # so a phase is passed by one byte at most
            room = min(room, self._phase_end - self.read + 1)
        return max(1, min(max_bytes, room))

    def add(self, n: int) -> None:
        """Count ``n`` bytes just read; raise ``WireCapExceeded`` past a cap."""
        self.read += n
        if self.read > self.limit:
            self._fail(f"more than {self.limit} bytes on the wire")
        if self._phase_end is not None and not self._phase_at_read and \
                self.read > self._phase_end:
            self._fail(f"{self._phase_name} over its cap")


_METER: contextvars.ContextVar[WireMeter | None] = contextvars.ContextVar(
    "cascade_wire_meter", default=None)


def metering(meter: WireMeter | None) -> contextvars.Token:
    """Count the current task's reads against ``meter``; reset with ``_METER.reset``."""
    return _METER.set(meter)


def reset_metering(token: contextvars.Token) -> None:
    _METER.reset(token)


def current_meter() -> WireMeter | None:
    return _METER.get()


class CountingStream(httpcore.AsyncNetworkStream):
    """A network stream whose reads are counted against the reading task's meter."""

    def __init__(self, inner: httpcore.AsyncNetworkStream) -> None:
        self._inner = inner

    async def read(self, max_bytes: int, timeout: float | None = None) -> bytes:
        meter = _METER.get()
        if meter is not None:  # never ask for more than the caps leave
            max_bytes = meter.before_read(max_bytes)
        data = await self._inner.read(max_bytes, timeout)
        if meter is not None:
            meter.add(len(data))
        return data

    async def write(self, buffer: bytes, timeout: float | None = None) -> None:
        await self._inner.write(buffer, timeout)

    async def aclose(self) -> None:
        await self._inner.aclose()

    async def start_tls(self, ssl_context: typing.Any, server_hostname: str | None = None,
                        timeout: float | None = None) -> httpcore.AsyncNetworkStream:
        return CountingStream(await self._inner.start_tls(ssl_context, server_hostname,
                                                          timeout))

    def get_extra_info(self, info: str) -> typing.Any:
        return self._inner.get_extra_info(info)
