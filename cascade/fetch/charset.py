"""Which character encoding a page is in, in the order the WHATWG Encoding and HTML
standards give: byte order mark, then the Content-Type charset, then a ``<meta>`` prescan
of the first 1024 bytes, then a detector (charset-normalizer) as the fallback, and
windows-1252 last. Decoding replaces bad bytes, never raises.
"""

from __future__ import annotations

import codecs
import re

__all__ = ["charset_from_content_type", "codec_for", "decode_text", "sniff_encoding"]

# WHATWG Encoding Standard: labels whose Python codec would differ from the standard's.
_WHATWG_ALIASES = {
    "iso-8859-1": "cp1252", "latin1": "cp1252", "l1": "cp1252", "ascii": "cp1252",
    "us-ascii": "cp1252", "iso8859-1": "cp1252", "windows-1252": "cp1252",
    "iso-8859-9": "cp1254", "latin5": "cp1254", "windows-874": "cp874",
    "tis-620": "cp874", "iso-8859-11": "cp874", "x-sjis": "shift_jis",
    "utf8": "utf-8", "unicode-1-1-utf-8": "utf-8", "gb2312": "gb18030", "gbk": "gb18030",
    "x-gbk": "gb18030", "ks_c_5601-1987": "cp949", "euc-kr": "cp949",
    "x-user-defined": "cp1252", "utf-16": "utf-16-le",
}
_META = re.compile(rb"""<meta[^>]+?charset\s*=\s*["']?\s*([A-Za-z0-9_.:\-]+)""", re.I)
_CT_CHARSET = re.compile(r"""charset\s*=\s*["']?([^"'\s;]+)""", re.I)


def codec_for(label: str | None) -> str | None:
    """The Python codec for an encoding label, or None for a label nobody knows."""
    if not label:
        return None
    label = label.strip().lower()
    label = _WHATWG_ALIASES.get(label, label)
    try:
        info = codecs.lookup(label)
    except LookupError:
        return None
    if not getattr(info, "_is_text_encoding", True) or info.name in ("idna", "undefined",
                                                                     "punycode"):
        return None  # base64, hex, rot13, zlib...: not character encodings
    return info.name


def charset_from_content_type(content_type: str | None) -> str | None:
    if not content_type:
        return None
    m = _CT_CHARSET.search(content_type)
    return m.group(1) if m else None


def sniff_encoding(body: bytes, content_type: str | None = None) -> tuple[str, str]:
    """Return ``(codec, how)``: how is ``bom``, ``header``, ``meta``, ``detected`` or
    ``default``."""
    if body.startswith(codecs.BOM_UTF8):
        return "utf-8-sig", "bom"
    if body.startswith(codecs.BOM_UTF16_LE):
        return "utf-16", "bom"
    if body.startswith(codecs.BOM_UTF16_BE):
        return "utf-16", "bom"
    header = codec_for(charset_from_content_type(content_type))
    if header:
        return header, "header"
    m = _META.search(body[:1024])
    if m:
        meta = codec_for(m.group(1).decode("ascii", "replace"))
        if meta:
            # HTML Standard: a meta charset of UTF-16 means UTF-8 (the bytes are ASCII here)
            return ("utf-8" if meta.startswith("utf-16") else meta), "meta"
    try:
        body[:65536].decode("utf-8")
        return "utf-8", "detected"
    except UnicodeDecodeError as exc:
        if exc.start > 65536 - 4:  # a character cut at the sample's end
            return "utf-8", "detected"
    try:
        from charset_normalizer import from_bytes

        best = from_bytes(body[:65536]).best()
        if best is not None and codec_for(best.encoding):
            return codec_for(best.encoding) or "cp1252", "detected"
    except Exception:  # noqa: BLE001 - a detector failure must not fail the fetch
        pass
    return "cp1252", "default"


def decode_text(body: bytes, content_type: str | None = None) -> tuple[str, str]:
    """Decode ``body`` to text; returns ``(text, codec)``. Bad bytes become U+FFFD."""
    codec, _how = sniff_encoding(body, content_type)
    try:
        return body.decode(codec, errors="replace"), codec
    except (LookupError, UnicodeError, ValueError):
        return body.decode("cp1252", errors="replace"), "cp1252"
