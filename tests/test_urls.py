"""URL normalization against RFC 3986, the WHATWG URL Standard, the Public Suffix List's own
test cases, and reference implementations (``ipaddress``, ``socket.inet_aton``, the
standard library's IDNA codec)."""

from __future__ import annotations

import dataclasses
import ipaddress
import re
import socket
from pathlib import Path

import idna
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cascade.errors import CascadeError, InvalidURL
from cascade.urls import (
    _normalize_general,
    normalize,
    normalize_percent_encoding,
    parse_ipv4_host,
    registered_domain,
    remove_dot_segments,
)

DATA = Path(__file__).parent / "data"


# ---------------------------------------------------------------- RFC 3986 section 6.2.2
@pytest.mark.parametrize(
    ("given_url", "expected"),
    [
        # RFC 3986 section 6.2.2.1: scheme and host are case-insensitive
        ("HTTP://www.EXAMPLE.com/", "http://www.example.com/"),
        # RFC 3986 section 6.2.2.1: hex digits of percent-encodings are uppercased
        ("http://example.com/a%3ab", "http://example.com/a%3Ab"),
        # RFC 3986 section 6.2.2.2: "%7Esmith" is "~smith" (unreserved, decoded)
        ("http://example.com/%7Esmith/home.html", "http://example.com/~smith/home.html"),
        # RFC 3986 section 6.2.2 example, with http for its scheme:
        # "eXAMPLE://a/./b/../b/%63/%7bfoo%7d" -> "example://a/b/c/%7Bfoo%7D"
        ("HTTP://a/./b/../b/%63/%7bfoo%7d", "http://a/b/c/%7Bfoo%7D"),
        # RFC 3986 section 6.2.3: these four are equivalent for http
        ("http://example.com", "http://example.com/"),
        ("http://example.com/", "http://example.com/"),
        ("http://example.com:/", "http://example.com/"),
        ("http://example.com:80/", "http://example.com/"),
        ("https://example.com:443/x", "https://example.com/x"),
        ("https://example.com:8443/x", "https://example.com:8443/x"),
        # RFC 3986 section 3.5: the fragment is not sent to the server; dropped
        ("http://example.com/page#section-2", "http://example.com/page"),
    ],
)
def test_rfc3986_normalization_examples(given_url: str, expected: str) -> None:
    assert normalize(given_url).url == expected


@pytest.mark.parametrize(
    ("path", "expected"),
    [
        # RFC 3986 section 5.2.4, the two worked examples given there
        ("/a/b/c/./../../g", "/a/g"),
        ("mid/content=5/../6", "mid/6"),
        # RFC 3986 section 5.4.1/5.4.2 results reached through dot-segments
        ("/b/c/../../../g", "/g"),
        ("/b/c/./g", "/b/c/g"),
        ("/b/c/g/..", "/b/c/"),
        ("/b/c/./", "/b/c/"),
    ],
)
def test_remove_dot_segments_matches_rfc3986(path: str, expected: str) -> None:
    assert remove_dot_segments(path) == expected


def test_percent_encoding_of_reserved_characters_is_kept() -> None:
    # RFC 3986 section 2.2: a percent-encoded reserved character ("/" as %2F) is data, not
    # a delimiter, so it must stay encoded.
    assert normalize_percent_encoding("a%2fb") == "a%2Fb"
    assert normalize_percent_encoding("a b") == "a%20b"
    assert normalize_percent_encoding("100%") == "100%25"


# ---------------------------------------------------------------- as a user types it
@pytest.mark.parametrize(
    ("typed", "expected"),
    [
        ("example.com", "http://example.com/"),
        ("Example.COM/Path", "http://example.com/Path"),
        ("//example.com/a", "http://example.com/a"),
        ("example.com:8080/x", "http://example.com:8080/x"),
        ("  http://example.com/\n", "http://example.com/"),
        # WHATWG URL Standard: a backslash is a path separator in special schemes
        ("http://example.com\\a\\b", "http://example.com/a/b"),
        # WHATWG URL Standard: "http:example.com" parses with the host example.com
        ("http:example.com/a", "http://example.com/a"),
        ("www.example.com./", "http://www.example.com/"),
    ],
)
def test_scheme_less_and_sloppy_input(typed: str, expected: str) -> None:
    assert normalize(typed).url == expected


def test_userinfo_is_dropped_and_flagged() -> None:
    key = normalize("https://bank.example@lure.test/login")
    assert key.host == "lure.test"
    assert key.had_userinfo
    assert "@" not in key.url


@pytest.mark.parametrize(
    "bad",
    ["", "   ", "ftp://example.com/", "javascript:alert(1)", "mailto:a@example.com",
     "http://", "http:///path", "http://exa mple.com/", "http://example.com:99999/",
     "http://example.com:12ab/", "http://-bad-.example/", "http://a..b.example/",
     "http://[::1/", "http://[zz::1]/", "http://1.2.3.4.5/", "http://256.1.1.1/",
     "http://" + "a" * 64 + ".example/", "x" * 20_000],
)
def test_malformed_input_raises_invalid_url_with_reason(bad: str) -> None:
    with pytest.raises(InvalidURL) as info:
        normalize(bad)
    assert info.value.reason
    assert isinstance(info.value, CascadeError)
    assert isinstance(info.value, ValueError)


def test_non_string_raises_invalid_url() -> None:
    with pytest.raises(InvalidURL):
        normalize(None)  # type: ignore[arg-type]


# ---------------------------------------------------------------- hosts
@pytest.mark.parametrize(
    ("host", "expected"),
    [
        ("0x7f000001", "127.0.0.1"),
        ("2130706433", "127.0.0.1"),
        ("0177.0.0.1", "127.0.0.1"),
        ("127.1", "127.0.0.1"),
        ("0x7f.1", "127.0.0.1"),
        ("192.168.0.1", "192.168.0.1"),
        ("10.0.0.1", "10.0.0.1"),
        ("0", "0.0.0.0"),
    ],
)
def test_ipv4_forms_read_as_a_browser_does(host: str, expected: str) -> None:
    # WHATWG URL Standard, IPv4 parser; cross-checked against glibc's inet_aton, which
    # accepts the same decimal/octal/hex and short forms (BSD rules).
    assert str(parse_ipv4_host(host)) == expected
    assert socket.inet_ntoa(socket.inet_aton(host)) == expected
    assert normalize(f"http://{host}/").host == expected
    assert normalize(f"http://{host}/").is_ip


def test_ipv6_literal_is_canonical() -> None:
    # ipaddress gives the RFC 5952 canonical text form
    key = normalize("http://[2001:DB8:0:0:0:0:0:1]:8080/x")
    assert key.host == str(ipaddress.IPv6Address("2001:db8::1")) == "2001:db8::1"
    assert key.url == "http://[2001:db8::1]:8080/x"
    mapped = normalize("http://[::ffff:127.0.0.1]/")
    assert ipaddress.IPv6Address(mapped.host).ipv4_mapped == ipaddress.IPv4Address("127.0.0.1")


def test_idn_host_goes_to_ascii_and_keeps_unicode_for_display() -> None:
    key = normalize("http://Café-Ledger.example/")
    # the standard library's IDNA 2003 codec agrees on this name (no characters where
    # IDNA 2003 and 2008 differ)
    assert key.host == "café-ledger.example".encode("idna").decode("ascii")
    assert key.host == "xn--caf-ledger-d7a.example"
    assert key.host_unicode == "café-ledger.example"
    # and the A-label form normalizes to the same key
    assert normalize("http://xn--caf-ledger-d7a.example/").url == key.url


def test_percent_encoded_host_is_decoded() -> None:
    # WHATWG URL Standard, host parser: the host is percent-decoded before IDNA
    assert normalize("http://ex%61mple.com/").host == "example.com"


# ---------------------------------------------------------------- Public Suffix List
def _psl_cases() -> list[tuple[str, str | None]]:
    cases = []
    pattern = re.compile(r"^checkPublicSuffix\((null|'[^']*'), (null|'[^']*')\);")
    for line in (DATA / "psl_test_cases.txt").read_text(encoding="utf-8").splitlines():
        m = pattern.match(line.strip())
        if m and m.group(1) != "null":
            expected = None if m.group(2) == "null" else m.group(2).strip("'")
            cases.append((m.group(1).strip("'"), expected))
    return cases


@pytest.mark.parametrize(("host", "expected"), _psl_cases())
def test_registered_domain_matches_public_suffix_list_test_cases(
    host: str, expected: str | None
) -> None:
    # Public Suffix List project, tests/test_psl.txt (copied in tests/data, public domain).
    # A host the URL parser refuses (a leading dot) has no registered domain.
    try:
        key = normalize(f"http://{host}/")
    except InvalidURL:
        assert expected is None
        return
    want = None if expected is None else idna.encode(expected, uts46=True).decode("ascii")
    assert key.registered_domain == want
    assert registered_domain(key.host) == want


def test_ip_hosts_have_no_registered_domain() -> None:
    assert normalize("http://192.0.2.7/").registered_domain is None


# ---------------------------------------------------------------- tokens
def test_tokens_are_tagged_by_place_and_digits_folded() -> None:
    key = normalize("https://news.harborgazette.test/articles/2026/harbour-strike?id=7&ref=m")
    tokens = key.tokens()
    assert ("domain", "harborgazette.test") in tokens
    assert ("suffix", "test") in tokens
    assert ("host", "news") in tokens and ("host", "harborgazette") in tokens
    assert ("path", "articles") in tokens and ("path", "harbour") in tokens
    assert ("path", "<n>4") in tokens
    assert ("query", "id") in tokens and ("query", "ref") in tokens


# ---------------------------------------------------------------- properties
@settings(max_examples=400, deadline=None)
@given(st.text(max_size=200))
def test_normalize_never_crashes_on_arbitrary_text(text: str) -> None:
    try:
        key = normalize(text)
    except InvalidURL:
        return
    assert key.url.startswith(("http://", "https://"))


_url_parts = st.builds(
    lambda scheme, host, path, query: f"{scheme}{host}{path}{query}",
    st.sampled_from(["", "http://", "https://", "HTTP://", "//"]),
    st.from_regex(r"[A-Za-z0-9]([A-Za-z0-9\-]{0,8}[A-Za-z0-9])?(\.[A-Za-z]{2,6}){1,2}",
                  fullmatch=True),
    st.text(alphabet=st.sampled_from(list("/.%~-_aZ09é ?=&:@!$'()*+,;")), max_size=30)
    .map(lambda p: "/" + p),
    st.one_of(st.just(""), st.text(alphabet="abc=&%2F09é", max_size=12).map(lambda q: "?" + q)),
)


@settings(max_examples=400, deadline=None)
@given(st.one_of(st.text(max_size=120), _url_parts))
def test_normalize_is_idempotent(text: str) -> None:
    try:
        once = normalize(text)
    except InvalidURL:
        return
    twice = normalize(once.url)
    # had_userinfo describes the input, not the normalized URL (which never has userinfo)
    assert dataclasses.replace(twice, had_userinfo=once.had_userinfo) == once


@settings(max_examples=400, deadline=None)
@given(_url_parts)
def test_fast_path_agrees_with_the_general_parser(text: str) -> None:
    try:
        general = _normalize_general(text)
    except InvalidURL:
        with pytest.raises(InvalidURL):
            normalize(text)
        return
    assert normalize(text) == general
