"""Parse and normalize URLs into a ``UrlKey``: the one form every later stage works on.

Normalization follows RFC 3986 section 6.2.2 (case, percent-encoding, dot-segments) and
6.2.3 (scheme-based: default ports, empty path), with the host read the way a browser reads
it (WHATWG URL Standard: IDNA to ASCII, numeric IPv4 forms such as ``0x7f000001``). The
registered domain comes from the Public Suffix List shipped in the ``publicsuffixlist``
package, so nothing is downloaded at run time.

Input is accepted the way a person types it: ``example.com/a`` means ``http://example.com/a``.
Anything that cannot be made into an ``http``/``https`` URL with a valid host raises
``InvalidURL`` with the reason.
"""

from __future__ import annotations

import ipaddress
import re
from dataclasses import dataclass
from functools import lru_cache
from urllib.parse import urlsplit

import idna
from publicsuffixlist import PublicSuffixList

from cascade.errors import InvalidURL

__all__ = [
    "MAX_URL_LENGTH",
    "UrlKey",
    "normalize",
    "registered_domain",
    "public_suffix",
    "remove_dot_segments",
    "normalize_percent_encoding",
    "parse_ipv4_host",
]

MAX_URL_LENGTH = 16_384
"""Longer input is refused: no real page needs it, and it bounds the work per URL."""

SCHEMES = ("http", "https")
DEFAULT_PORTS = {"http": 80, "https": 443}

# WHATWG URL Standard, "basic URL parser": leading/trailing C0 control or space is stripped,
# ASCII tab and newline anywhere are removed.
_C0_OR_SPACE = "".join(chr(i) for i in range(0x21))
_TAB_NEWLINE = re.compile(r"[\t\n\r]")
_HAS_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.\-]*):(.*)$", re.S)
_PCT = re.compile(r"%([0-9A-Fa-f]{2})")
# RFC 3986 section 2.3: unreserved = ALPHA / DIGIT / "-" / "." / "_" / "~"
_UNRESERVED = frozenset("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-._~")
# Characters left as they are in a path or query (RFC 3986 pchar, plus "/" and "?");
# everything else (space, controls, non-ASCII, '"', '<', ...) is percent-encoded as UTF-8.
_KEEP = _UNRESERVED | frozenset("!$&'()*+,;=:@/?%")
_NEEDS_ENCODING_WORK = re.compile(r"[^A-Za-z0-9\-._~!$&'()*+,;=:@/?]")
_HOST_LABEL = re.compile(r"^[a-z0-9_](?:[a-z0-9_\-]{0,61}[a-z0-9_])?$")
# WHATWG "forbidden host code points" (minus '%', handled by decoding first).
_FORBIDDEN_HOST = re.compile(r"[\x00-\x20#/:<>?@\[\\\]^|\x7f]")
_TOKEN_SPLIT = re.compile(r"[^0-9a-z\u00c0-\uffff]+")
_WORDS = re.compile(r"[0-9a-z\u00c0-\uffff]+")
_DIGITS = re.compile(r"^[0-9]+$")

_PSL = PublicSuffixList()

# Most URLs in a lookup log are plain: lowercase ASCII host, no port, no userinfo, nothing to
# decode or re-encode, no dot-segments. They skip the general parser (same result, less work).
_SIMPLE = re.compile(
    r"^(?:(https?)://)?"
    r"((?:[a-z0-9_](?:[a-z0-9_\-]{0,61}[a-z0-9_])?\.)*[a-z_](?:[a-z0-9_\-]{0,61}[a-z0-9_])?)"
    r"(/[A-Za-z0-9\-._~!$&'()*+,;=:@/]*)?(?:\?([A-Za-z0-9\-._~!$&'()*+,;=:@/?]*))?$"
)


@dataclass(frozen=True, slots=True)
class UrlKey:
    """A URL in normal form, with the parts later stages need.

    ``url`` is the normalized string (the identity used for dedupe and in the store);
    ``host`` is ASCII (IDNA A-labels, or a canonical IP literal); ``host_unicode`` is for
    display and for the URL model's character features.
    """

    url: str
    scheme: str
    host: str
    host_unicode: str
    port: int | None
    path: str
    query: str
    registered_domain: str | None
    public_suffix: str | None
    is_ip: bool
    had_userinfo: bool = False

    @property
    def feature_text(self) -> str:
        """What the URL model reads: host, path and query, without scheme or default port."""
        port = f":{self.port}" if self.port is not None else ""
        query = f"?{self.query}" if self.query else ""
        return f"{self.host_unicode}{port}{self.path}{query}"

    def tokens(self) -> list[tuple[str, str]]:
        """Position-tagged word tokens: ``(place, word)`` with place one of
        ``host`` (a host label word), ``domain`` (the registered domain, whole),
        ``suffix`` (the public suffix), ``path`` (a path word), ``query`` (a query key word).
        Runs of digits become ``<n>`` plus their length, so ids do not flood the vocabulary.
        """
        out = list(_host_tokens(self.host_unicode, self.public_suffix, self.registered_domain,
                                self.is_ip))
        path = self.path.lower()
        if "%" in path:
            path = _unquote_for_tokens(path)
        out.extend([("path", f"<n>{len(w)}" if w.isdigit() else w)
                    for w in _WORDS.findall(path)])
        if self.query:
            for pair in self.query.split("&"):
                key = pair.partition("=")[0].lower()
                if "%" in key:
                    key = _unquote_for_tokens(key)
                out.extend([("query", f"<n>{len(w)}" if w.isdigit() else w)
                            for w in _WORDS.findall(key)])
        return out

    def __str__(self) -> str:
        return self.url


@lru_cache(maxsize=65_536)
def _host_tokens(
    host_unicode: str, suffix: str | None, domain: str | None, is_ip: bool
) -> tuple[tuple[str, str], ...]:
    out: list[tuple[str, str]] = []
    if domain:
        out.append(("domain", domain))
    if suffix:
        out.append(("suffix", suffix))
    host = host_unicode.lower()
    if suffix and not is_ip and host.endswith(suffix):
        host = host[: -len(suffix)]
    for word in _TOKEN_SPLIT.split(host):
        if word:
            out.append(("host", _word(word)))
    return tuple(out)


def _word(word: str) -> str:
    return f"<n>{len(word)}" if _DIGITS.match(word) else word


def _unquote_for_tokens(text: str) -> str:
    if "%" not in text:
        return text
    try:
        return _PCT.sub(lambda m: chr(int(m.group(1), 16)) if int(m.group(1), 16) < 0x80 else " ",
                        text)
    except ValueError:  # pragma: no cover - the pattern only matches hex
        return text


def normalize(text: str) -> UrlKey:
    """Normalize ``text`` (a URL, or a host/path as a user types it) to a ``UrlKey``.

    Raises ``InvalidURL`` when the text is not an http(s) URL with a valid host.
    """
    if not isinstance(text, str):
        raise InvalidURL(repr(text), f"expected a string, got {type(text).__name__}")
    simple = _SIMPLE.match(text)
    if simple is not None and len(text) <= MAX_URL_LENGTH and "xn--" not in text:
        scheme, host, path, query = simple.groups()
        if (not path or "/." not in path) and len(host) <= 253:
            return _make_key(scheme or "http", host, None, path or "/", query or "", False)
    return _normalize_general(text)


def _normalize_general(text: str) -> UrlKey:
    """The full parser; ``normalize`` gives the same answer faster for plain URLs."""
    raw = text
    text = _TAB_NEWLINE.sub("", text.strip(_C0_OR_SPACE))
    if not text:
        raise InvalidURL(raw, "empty")
    if len(text) > MAX_URL_LENGTH:
        raise InvalidURL(raw, f"longer than {MAX_URL_LENGTH} characters")
    text = text.replace("\\", "/")  # WHATWG: in special schemes a backslash is a slash
    match = _HAS_SCHEME.match(text)
    if match and not (match.group(2)[:1].isdigit() and "://" not in text):
        scheme = match.group(1).lower()
        if scheme not in SCHEMES:
            raise InvalidURL(raw, f"scheme {scheme!r} is not http or https")
        rest = match.group(2)
        if not rest.startswith("//"):
            rest = "//" + rest.lstrip("/")  # WHATWG: "http:example.com" and "http:/x" mean //
        text = f"{scheme}:{rest}"
    elif text.startswith("//"):
        text = "http:" + text
    else:
        text = "http://" + text
    try:
        parts = urlsplit(text)
    except ValueError as exc:
        raise InvalidURL(raw, str(exc)) from None
    scheme = parts.scheme.lower()
    netloc = parts.netloc
    had_userinfo = "@" in netloc
    if had_userinfo:
        netloc = netloc.rsplit("@", 1)[1]
    host_text, port = _split_port(raw, netloc)
    host, host_unicode, is_ip = _normalize_host(raw, host_text)
    if port is not None and port == DEFAULT_PORTS[scheme]:
        port = None
    path = remove_dot_segments(normalize_percent_encoding(parts.path)) or "/"
    query = normalize_percent_encoding(parts.query) if parts.query else ""
    return _make_key(scheme, host, port, path, query, is_ip, host_unicode, had_userinfo)


def _make_key(
    scheme: str,
    host: str,
    port: int | None,
    path: str,
    query: str,
    is_ip: bool,
    host_unicode: str | None = None,
    had_userinfo: bool = False,
) -> UrlKey:
    suffix, domain = (None, None) if is_ip else _psl_lookup(host)
    port_text = f":{port}" if port is not None else ""
    netloc_out = f"[{host}]" if ":" in host else host
    url = f"{scheme}://{netloc_out}{port_text}{path}" + (f"?{query}" if query else "")
    return UrlKey(
        url, scheme, host, host_unicode or host, port, path, query, domain, suffix, is_ip,
        had_userinfo,
    )


def _split_port(raw: str, netloc: str) -> tuple[str, int | None]:
    if netloc.startswith("["):
        end = netloc.find("]")
        if end < 0:
            raise InvalidURL(raw, "unclosed '[' in an IPv6 host")
        host, rest = netloc[: end + 1], netloc[end + 1 :]
        if rest and not rest.startswith(":"):
            raise InvalidURL(raw, "unexpected text after an IPv6 host")
        port_text = rest[1:] if rest else ""
    else:
        host, _, port_text = netloc.partition(":")
    if not port_text:
        return host, None
    if not port_text.isascii() or not port_text.isdigit():
        raise InvalidURL(raw, f"port {port_text!r} is not a number")
    port = int(port_text)
    if port > 65535:
        raise InvalidURL(raw, f"port {port} is out of range")
    return host, port


def _normalize_host(raw: str, host: str) -> tuple[str, str, bool]:
    """Return (ASCII host, Unicode host, is_ip)."""
    if not host:
        raise InvalidURL(raw, "no host")
    if host.startswith("["):
        try:
            addr = ipaddress.IPv6Address(host[1:-1].split("%", 1)[0])
        except ValueError:
            raise InvalidURL(raw, f"{host!r} is not a valid IPv6 address") from None
        return str(addr), str(addr), True
    if "%" in host:
        try:
            host = _PCT.sub(lambda m: chr(int(m.group(1), 16)), host)
            host = host.encode("latin-1").decode("utf-8")
        except (UnicodeDecodeError, UnicodeEncodeError):
            raise InvalidURL(raw, "percent-encoded host is not UTF-8") from None
    host = host.lower().rstrip(".")
    if not host:
        raise InvalidURL(raw, "no host")
    if _FORBIDDEN_HOST.search(host):
        raise InvalidURL(raw, f"host {host!r} contains a character not allowed in a host")
    ipv4 = parse_ipv4_host(host)
    if ipv4 is not None:
        return str(ipv4), str(ipv4), True
    if host.isascii():
        ascii_host = host
        unicode_host = host
        if "xn--" in host:
            try:
                unicode_host = _idna_decode(host)
            except idna.IDNAError:
                unicode_host = host  # keep it displayable as it came; label checks follow
    else:
        try:
            ascii_host = _idna_encode(host)
        except (idna.IDNAError, UnicodeError) as exc:
            raise InvalidURL(raw, f"host {host!r} is not a valid internationalized name: {exc}") \
                from None
        try:
            unicode_host = _idna_decode(ascii_host)
        except idna.IDNAError:
            unicode_host = host
        ipv4 = parse_ipv4_host(ascii_host)  # WHATWG: "１２７.０.０.１" maps to digits
        if ipv4 is not None:
            return str(ipv4), str(ipv4), True
    if len(ascii_host) > 253:
        raise InvalidURL(raw, "host is longer than 253 characters")
    for label in ascii_host.split("."):
        if not _HOST_LABEL.match(label):
            shown = label if label else "(empty)"
            raise InvalidURL(raw, f"host label {shown!r} is not a valid DNS label")
    return ascii_host, unicode_host, False


def _parse_ipv4_number(part: str) -> int | None:
    """WHATWG URL Standard, "IPv4 number parser": decimal, 0x hex, or leading-0 octal."""
    if part == "":
        return None
    base = 10
    if part[:2] in ("0x", "0X"):
        part, base = part[2:], 16
    elif len(part) > 1 and part[0] == "0":
        part, base = part[1:], 8
    if part == "":
        return 0
    try:
        return int(part, base)
    except ValueError:
        return None


def parse_ipv4_host(host: str) -> ipaddress.IPv4Address | None:
    """Read ``host`` as an IPv4 address the way a browser does, or return None.

    WHATWG URL Standard, "ends in a number" and "IPv4 parser": ``0x7f000001``,
    ``2130706433``, ``0177.0.0.1`` and ``127.1`` all mean 127.0.0.1. A host whose last label
    is numeric but which is not a valid address raises ``InvalidURL`` (a browser fails too).
    """
    parts = host.split(".")
    if parts[-1] == "" and len(parts) > 1:
        parts = parts[:-1]
    last = parts[-1]
    if not (last.isascii() and (last.isdigit() or (last[:2] in ("0x", "0X")
                                                   and all(c in "0123456789abcdefABCDEF"
                                                           for c in last[2:])))):
        return None
    if len(parts) > 4:
        raise InvalidURL(host, "looks like an IPv4 address but has more than four parts")
    numbers = []
    for part in parts:
        value = _parse_ipv4_number(part)
        if value is None:
            raise InvalidURL(host, f"looks like an IPv4 address but {part!r} is not a number")
        numbers.append(value)
    if any(n > 255 for n in numbers[:-1]) or numbers[-1] >= 256 ** (5 - len(numbers)):
        raise InvalidURL(host, "looks like an IPv4 address but a part is out of range")
    value = numbers[-1]
    for i, n in enumerate(numbers[:-1]):
        value += n * 256 ** (3 - i)
    return ipaddress.IPv4Address(value)


def normalize_percent_encoding(text: str) -> str:
    """RFC 3986 section 6.2.2.1-6.2.2.2: decode percent-encoded unreserved characters,
    uppercase the hex digits of the rest, and percent-encode (as UTF-8) characters a URL
    cannot hold literally. A '%' not followed by two hex digits is encoded as ``%25``.
    """
    if not _NEEDS_ENCODING_WORK.search(text):
        return text
    out: list[str] = []
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c == "%":
            if i + 2 < n and _is_hex(text[i + 1 : i + 3]):
                ch = chr(int(text[i + 1 : i + 3], 16))
                out.append(ch if ch in _UNRESERVED else "%" + text[i + 1 : i + 3].upper())
                i += 3
                continue
            out.append("%25")
        elif c in _KEEP:
            out.append(c)
        else:
            out.append("".join(f"%{b:02X}" for b in c.encode("utf-8", "surrogatepass")))
        i += 1
    return "".join(out)


def _is_hex(pair: str) -> bool:
    return len(pair) == 2 and all(c in "0123456789abcdefABCDEF" for c in pair)


def remove_dot_segments(path: str) -> str:
    """RFC 3986 section 5.2.4, "Remove Dot Segments", as written there."""
    if "." not in path:
        return path
    inp = path
    out: list[str] = []
    while inp:
        if inp.startswith("../"):
            inp = inp[3:]
        elif inp.startswith("./"):
            inp = inp[2:]
        elif inp.startswith("/./"):
            inp = "/" + inp[3:]
        elif inp == "/.":
            inp = "/"
        elif inp.startswith("/../"):
            inp = "/" + inp[4:]
            if out:
                out.pop()
        elif inp == "/..":
            inp = "/"
            if out:
                out.pop()
        elif inp in (".", ".."):
            inp = ""
        else:
            start = 1 if inp.startswith("/") else 0
            end = inp.find("/", start)
            if end < 0:
                end = len(inp)
            out.append(inp[:end])
            inp = inp[end:]
    return "".join(out)


@lru_cache(maxsize=65_536)
def _psl_lookup(host: str) -> tuple[str | None, str | None]:
    domain = _PSL.privatesuffix(host)
    if domain is None:
        return _PSL.publicsuffix(host), None
    return domain.partition(".")[2], domain


def registered_domain(host: str) -> str | None:
    """The registrable domain of an ASCII host (public suffix plus one label), per the PSL."""
    return _psl_lookup(host.lower().rstrip("."))[1]


def public_suffix(host: str) -> str | None:
    """The public suffix of an ASCII host, per the PSL (unknown TLDs count as suffixes)."""
    return _psl_lookup(host.lower().rstrip("."))[0]


# idna's UTS 46 mapping is pure Python (about 90 us a host); hosts repeat in any log, so
# the conversions are cached (failures raise again each time: lru_cache keeps no errors)
@lru_cache(maxsize=65_536)
def _idna_encode(host: str) -> str:
    return idna.encode(host, uts46=True, transitional=False).decode("ascii")


@lru_cache(maxsize=65_536)
def _idna_decode(host: str) -> str:
    return idna.decode(host)
