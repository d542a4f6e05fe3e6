"""The address guard against the IANA special-purpose registries' published entries and
against the standard library's ``ipaddress`` classification."""

from __future__ import annotations

import ipaddress

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cascade.fetch.address_guard import AddressGuard, special_blocks

GUARD = AddressGuard()


@pytest.mark.parametrize(
    "address",
    [
        # one address from each entry of the IANA IPv4 Special-Purpose Address Registry
        # (RFC 6890 and updates), plus multicast (RFC 5771) and limited broadcast
        "0.0.0.0", "0.1.2.3", "10.0.0.1", "10.255.255.255", "100.64.0.1", "100.127.255.254",
        "127.0.0.1", "127.0.0.2", "127.255.255.255", "169.254.169.254", "172.16.0.1",
        "172.31.255.255", "192.0.0.1", "192.0.0.170", "192.0.2.1", "192.31.196.1",
        "192.52.193.1", "192.88.99.1", "192.168.1.1", "192.175.48.1", "198.18.0.1",
        "198.19.255.255", "198.51.100.7", "203.0.113.9", "224.0.0.1", "239.255.255.250",
        "240.0.0.1", "255.255.255.255",
        # IANA IPv6 Special-Purpose Address Registry entries, multicast, deprecated site-local
        "::", "::1", "::ffff:127.0.0.1", "::ffff:10.0.0.1", "::ffff:8.8.8.8", "::127.0.0.1",
        "::ffff:0:7f00:1", "64:ff9b::7f00:1", "64:ff9b::a9fe:a9fe", "64:ff9b:1::1", "100::1",
        "2001::1", "2001:2::1", "2001:db8::1", "2002:7f00:1::1", "2002:0808:0808::1",
        "2620:4f:8000::1", "3fff::1", "5f00::1", "fc00::1", "fd12:3456::1", "fe80::1",
        "fec0::1", "ff02::1", "ff05::1:3",
        # outside 2000::/3 (IANA IPv6 Address Space registry: reserved by IETF)
        "4000::1", "8000::1", "1::1",
    ],
)
def test_special_purpose_addresses_are_refused(address: str) -> None:
    decision = GUARD.check(address)
    assert not decision.allowed, decision
    assert decision.reason


@pytest.mark.parametrize(
    "address",
    # globally routable unicast: public resolver and hosting addresses, picked from outside
    # every registry block (from memory: addresses of well-known public services)
    ["8.8.8.8", "1.1.1.1", "9.9.9.9", "93.184.215.14", "151.101.1.69", "2606:4700:4700::1111",
     "2001:4860:4860::8888", "2a00:1450:4001:82a::200e", "64:ff9b::808:808"],
)
def test_globally_routable_unicast_is_allowed(address: str) -> None:
    assert GUARD.check(address).allowed


def test_holes_are_explicit_and_exact() -> None:
    guard = AddressGuard(allow_networks=["127.0.0.1/32"])
    assert guard.allowed("127.0.0.1")
    assert not guard.allowed("127.0.0.2")
    assert not guard.allowed("::ffff:127.0.0.1")
    assert not guard.allowed("::1")
    assert not AddressGuard().allowed("127.0.0.1")


def test_nat64_form_of_a_refused_address_stays_refused_even_with_a_hole() -> None:
    guard = AddressGuard(allow_networks=["127.0.0.1/32"])
    assert not guard.allowed("64:ff9b::7f00:1")


def test_scoped_and_malformed_addresses_are_refused() -> None:
    assert not GUARD.allowed("fe80::1%eth0")
    assert not GUARD.allowed("not-an-address")
    assert not GUARD.allowed("")


def test_table_covers_every_block_that_ipaddress_calls_private() -> None:
    # ipaddress keeps its own table of the same registries (IPv4Address/IPv6Address
    # is_private); each of its networks must be refused by ours as well
    from ipaddress import _IPv4Constants, _IPv6Constants  # type: ignore[attr-defined]

    for network in (_IPv4Constants._private_networks + _IPv6Constants._private_networks):
        for addr in (network.network_address, network.broadcast_address):
            assert not GUARD.allowed(addr), (network, addr)


@settings(max_examples=3000, deadline=None)
@given(st.integers(min_value=0, max_value=2**32 - 1))
def test_every_ipv4_address_ipaddress_calls_non_global_is_refused(value: int) -> None:
    addr = ipaddress.IPv4Address(value)
    if not addr.is_global or addr.is_multicast:
        assert not GUARD.allowed(addr), addr


@settings(max_examples=3000, deadline=None)
@given(st.integers(min_value=0, max_value=2**128 - 1))
def test_every_ipv6_address_ipaddress_calls_non_global_is_refused(value: int) -> None:
    addr = ipaddress.IPv6Address(value)
    if not addr.is_global or addr.is_multicast or addr.is_reserved:
        assert not GUARD.allowed(addr), addr


def test_registry_data_is_well_formed() -> None:
    v4, v6, global_unicast = special_blocks()
    assert len(v4) >= 19 and len(v6) >= 20
    assert all(b.source.startswith("RFC") for b in v4 + v6)
    assert str(global_unicast) == "2000::/3"
