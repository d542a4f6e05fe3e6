"""The address guard: may the fetcher connect to this IP address?

It judges the address the socket will actually connect to, never the URL string. An address
is allowed only if it is globally routable unicast: not in any block of the special-purpose
registries (kept as data in ``special_addresses.json``), not multicast or reserved, and for
IPv6 inside the global unicast space 2000::/3. IPv6 forms that carry an IPv4 address
(mapped, compatible, translated, 6to4, Teredo) are refused outright; the NAT64 well-known
prefix is judged by the IPv4 address it carries. ``ipaddress.is_global`` is not relied on
alone (its ranges have been wrong in past Python releases); the tests compare the two.

Holes (``allow_networks``) are explicit and empty by default; tests open one for the single
loopback address their server listens on.
"""

from __future__ import annotations

import ipaddress
import json
from collections.abc import Iterable
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

__all__ = ["AddressDecision", "AddressGuard", "Block", "special_blocks"]

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
IPNetwork = ipaddress.IPv4Network | ipaddress.IPv6Network


@dataclass(frozen=True)
class Block:
    """One refused block of addresses, with the name and source of its registry entry."""

    network: IPNetwork
    name: str
    source: str
    carries_ipv4: bool = False


@dataclass(frozen=True)
class AddressDecision:
    address: str
    allowed: bool
    reason: str  # "globally routable", "allowed by policy hole 127.0.0.1/32", "loopback ..."


@lru_cache(maxsize=1)
def special_blocks() -> tuple[tuple[Block, ...], tuple[Block, ...], ipaddress.IPv6Network]:
    """The refused IPv4 and IPv6 blocks, and the IPv6 global unicast space, from the data file."""
    ref = resources.files("cascade.fetch") / "special_addresses.json"
    data = json.loads(ref.read_text(encoding="utf-8"))

    def blocks(rows: list[dict]) -> tuple[Block, ...]:
        out = [Block(ipaddress.ip_network(r["network"]), r["name"], r["source"],
                     bool(r.get("carries_ipv4", False))) for r in rows]
        # most specific first, so a decision names the narrowest block
        return tuple(sorted(out, key=lambda b: -b.network.prefixlen))

    return blocks(data["ipv4"]), blocks(data["ipv6"]), ipaddress.IPv6Network(
        data["ipv6_global_unicast"])


class AddressGuard:
    """Decides per address; ``allow_networks`` are the only exceptions."""

    def __init__(self, allow_networks: Iterable[str | IPNetwork] = ()) -> None:
        self.allow_networks = tuple(ipaddress.ip_network(n) for n in allow_networks)

    def check(self, address: str | IPAddress) -> AddressDecision:
        text = str(address)
        if "%" in text:
            return AddressDecision(text, False, "scoped IPv6 address (zone index)")
        try:
            addr = ipaddress.ip_address(text)
        except ValueError:
            return AddressDecision(text, False, "not an IP address")
        for hole in self.allow_networks:
            if addr.version == hole.version and addr in hole:
                return AddressDecision(str(addr), True, f"allowed by policy hole {hole}")
        v4_blocks, v6_blocks, global_unicast = special_blocks()
        if isinstance(addr, ipaddress.IPv4Address):
            for block in v4_blocks:
                if addr in block.network:
                    return AddressDecision(str(addr), False, f"{block.name} ({block.source})")
            return AddressDecision(str(addr), True, "globally routable")
        for block in v6_blocks:
            if addr in block.network:
                if block.carries_ipv4 and block.network.prefixlen == 96 and \
                        block.network.network_address == ipaddress.IPv6Address("64:ff9b::"):
                    inner = ipaddress.IPv4Address(int(addr) & 0xFFFFFFFF)
                    decision = self.check(inner)
                    if decision.allowed and not decision.reason.startswith("allowed by"):
                        return AddressDecision(str(addr), True,
                                               f"NAT64 form of {inner}, globally routable")
                    return AddressDecision(str(addr), False,
                                           f"NAT64 form of {inner}: {decision.reason}")
                if block.carries_ipv4:
                    return AddressDecision(str(addr), False,
                                           f"{block.name} ({block.source}), carries "
                                           f"{_embedded_ipv4(addr)}")
                return AddressDecision(str(addr), False, f"{block.name} ({block.source})")
        if addr not in global_unicast:
            return AddressDecision(str(addr), False,
                                   "outside IPv6 global unicast 2000::/3 (reserved)")
        return AddressDecision(str(addr), True, "globally routable")

    def allowed(self, address: str | IPAddress) -> bool:
        return self.check(address).allowed


def _embedded_ipv4(addr: ipaddress.IPv6Address) -> str:
    if addr.ipv4_mapped is not None:
        return str(addr.ipv4_mapped)
    if addr.sixtofour is not None:
        return str(addr.sixtofour)
    if addr.teredo is not None:
        return f"{addr.teredo[1]} (Teredo client)"
    return str(ipaddress.IPv4Address(int(addr) & 0xFFFFFFFF))
