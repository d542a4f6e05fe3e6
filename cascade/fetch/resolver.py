"""Name resolution for the fetcher, injectable: the system resolver by default, fixed
answers for tests and debugging (``--resolve HOST:ADDRESS``), or any object with
``async resolve(host, port) -> list[str]``.

The fetcher resolves once per hop, checks every answer with the address guard, and connects
to an address it checked (see ``transport.py``): no second lookup, so an answer that changes
between check and connect (DNS rebinding) cannot redirect the connection.
"""

from __future__ import annotations

import asyncio
import ipaddress
import socket
from collections.abc import Iterable, Mapping, Sequence
from typing import Protocol

from cascade.errors import CascadeError

__all__ = [
    "ResolutionError",
    "Resolver",
    "StaticResolver",
    "SystemResolver",
    "parse_resolve_overrides",
]


class ResolutionError(CascadeError):
    """The name has no usable address (NXDOMAIN, no A/AAAA, resolver failure). Inside the
    fetcher it becomes the ``dns-error`` outcome; it reaches a caller only from a resolver
    used on its own."""


class Resolver(Protocol):
    async def resolve(self, host: str, port: int) -> list[str]:
        """Every address the name has, as text, in the resolver's order."""
        ...


class SystemResolver:
    """The operating system's resolver (``getaddrinfo``), run without blocking the loop."""

    async def resolve(self, host: str, port: int) -> list[str]:
        loop = asyncio.get_running_loop()
        try:
            infos = await loop.getaddrinfo(host, port, type=socket.SOCK_STREAM,
                                           proto=socket.IPPROTO_TCP)
        except (socket.gaierror, UnicodeError, OSError) as exc:
            raise ResolutionError(f"{host}: {exc}") from None
        out: list[str] = []
        for info in infos:
            address = str(info[4][0])
            if address not in out:
                out.append(address)
        if not out:
            raise ResolutionError(f"{host}: no addresses")
        return out


class StaticResolver:
    """Fixed answers: ``{"host": ["addr", ...]}``, or ``{"*.farm.test": [...]}`` for every
    name below ``farm.test``; other names go to ``fallback`` (or fail).

    A value may also be a sequence of answer lists, handed out in turn per lookup (the last
    repeats): tests use it to play a resolver that changes its answer.
    """

    def __init__(self, answers: Mapping[str, Sequence[str] | Sequence[Sequence[str]]],
                 fallback: Resolver | None = None) -> None:
        self.answers = {h.lower().rstrip("."): v for h, v in answers.items()}
        self.fallback = fallback
        self.lookups: dict[str, int] = {}

    def _key(self, host: str) -> str | None:
        """The answer's key: the name itself, else the nearest ``*.parent`` wildcard (a
        wildcard covers every name below its parent, at any depth, not the parent)."""
        key = host.lower().rstrip(".")
        if key in self.answers:
            return key
        parts = key.split(".")
        for i in range(1, len(parts)):
            wild = "*." + ".".join(parts[i:])
            if wild in self.answers:
                return wild
        return None

    async def resolve(self, host: str, port: int) -> list[str]:
        key = self._key(host)
        if key is None:
            if self.fallback is None:
                raise ResolutionError(f"{host}: not in the fixed answers")
            return await self.fallback.resolve(host, port)
        value = self.answers[key]
        count = self.lookups.get(key, 0)
        self.lookups[key] = count + 1
        if value and not isinstance(value[0], str):
            turns = list(value)
            return list(turns[min(count, len(turns) - 1)])
        return list(value)  # type: ignore[arg-type]


def parse_resolve_overrides(items: Iterable[str]) -> dict[str, list[str]]:
    """``["host:1.2.3.4", "host:[::1]", "*.farm.test:127.0.0.1"]`` to
    ``{"host": ["1.2.3.4", "::1"], "*.farm.test": ["127.0.0.1"]}``."""
    out: dict[str, list[str]] = {}
    for item in items:
        host, sep, address = item.partition(":")
        if not sep or not host or not address:
            raise ValueError(f"--resolve takes HOST:ADDRESS, not {item!r}")
        address = address.strip("[]")
        ipaddress.ip_address(address)  # raises ValueError for a non-address
        if "*" in host and not (host.startswith("*.") and host[2:] and "*" not in host[2:]):
            raise ValueError(f"--resolve: a wildcard is '*.' before a name, as in "
                             f"*.farm.test, not {host!r}")
        out.setdefault(host.lower(), []).append(address)
    return out
