"""Which character encoding a page is in, and its text, the way a browser reads it.

The order is the HTML Standard's "determining the character encoding" (section 13.2.3.2):
a byte order mark; then the Content-Type charset; then, for HTML, a ``<meta>`` prescan of
the first 1024 bytes; then, with nothing declared, UTF-8 if the bytes are valid UTF-8, else
windows-1252 (the standard's default for most locales). Labels are resolved only through the
WHATWG Encoding Standard's table (section 4.2, "Names and labels", via ``webencodings``): a
label outside it (``utf-7``, ``unicode_escape``, ``cp037``, ``base64``...) is ignored, never
looked up in Python's codec registry. A label for the ``replacement`` encoding
(``iso-2022-kr``, ``hz-gb-2312``...) decodes to a single U+FFFD and is reported as codec
``"replacement"`` so the fetcher can end the fetch ``not-text``. Decoding never raises.
"""

from __future__ import annotations

import codecs

import webencodings

__all__ = ["REPLACEMENT", "X_USER_DEFINED", "charset_from_content_type", "codec_for",
           "decode_text", "sniff_encoding"]

#: The codec name ``codec_for`` and ``decode_text`` give for a label of the WHATWG
#: ``replacement`` encoding: the whole body decodes to one U+FFFD (a browser shows nothing).
REPLACEMENT = "replacement"
#: The codec name for WHATWG ``x-user-defined`` (bytes 0x80-0xFF to U+F780-U+F7FF); not a
#: Python codec, decoded here by table.
X_USER_DEFINED = "x-user-defined"

# WHATWG encoding name -> Python codec, where Python's codec of the same name differs from
# the standard's decoder or Python has no such name. From memory of the Encoding Standard,
# checked against webencodings 0.6.1 (which remaps the first seven the same way):
_PYTHON_CODEC = {
    "iso-8859-8-i": "iso8859-8",  # same bytes as ISO-8859-8; "-i" only tells the direction
    "x-mac-cyrillic": "mac-cyrillic",
    "macintosh": "mac-roman",
    "windows-874": "cp874",
    "shift_jis": "cp932",  # the standard's index jis0208 holds the Windows (NEC/IBM) rows
    "big5": "big5hkscs",  # the standard's index big5 includes HKSCS
    "euc-kr": "cp949",  # the standard's EUC-KR is the Windows (UHC) superset
    "gbk": "gb18030",  # Encoding Standard section 10.1.1: GBK's decoder is gb18030's
}

_WHITESPACE = b"\t\n\x0c\r "  # HTML Standard: ASCII whitespace as the prescan knows it
_HTTP_WHITESPACE = "\t\n\r "  # Fetch Standard: HTTP whitespace
_PRESCAN_BYTES = 1024  # HTML Standard section 13.2.3.2: the prescan reads the first 1024 bytes
_HTML_TYPES = ("text/html", "application/xhtml+xml")


def _windows_1252_table() -> str:
    """WHATWG windows-1252 as a 256-character decoding table: Python's ``cp1252`` leaves
    0x81, 0x8D, 0x8F, 0x90 and 0x9D undefined, the standard's index-windows-1252 maps each
    to the code point of the same value (from memory of the index; a browser shows them as
    C1 controls, not as U+FFFD)."""
    out = []
    for b in range(256):
        try:
            out.append(bytes([b]).decode("cp1252"))
        except UnicodeDecodeError:
            out.append(chr(b))
    return "".join(out)


_WINDOWS_1252 = _windows_1252_table()
# WHATWG Encoding Standard section 14.3 (x-user-defined): 0x00-0x7F as is, 0x80-0xFF to
# U+F780-U+F7FF (section number from memory)
_X_USER_DEFINED = "".join(chr(b) if b < 0x80 else chr(0xF780 + b - 0x80) for b in range(256))


def _whatwg_name(label: str | bytes | None) -> str | None:
    """The WHATWG encoding name of a label (``get an encoding``), or None if the label is
    not in the standard's table."""
    if label is None:
        return None
    if isinstance(label, bytes):
        label = label.decode("latin-1")
    encoding = webencodings.lookup(label)
    return None if encoding is None else encoding.name


def _codec_of_name(name: str) -> str:
    """The Python codec (or ``replacement`` / ``x-user-defined``) for a WHATWG name."""
    if name in (REPLACEMENT, X_USER_DEFINED):
        return name
    return codecs.lookup(_PYTHON_CODEC.get(name, name)).name


def codec_for(label: str | None) -> str | None:
    """The codec for an encoding label per the WHATWG Encoding Standard, or None for a
    label not in its table (such a label is ignored, never looked up in Python's registry).

    The result is a Python codec name (``"utf-8"``, ``"cp1252"``...), or one of the two
    encodings Python does not have: ``"replacement"`` and ``"x-user-defined"``;
    ``decode_text`` decodes all of them."""
    name = _whatwg_name(label)
    return None if name is None else _codec_of_name(name)


def _parameters(content_type: str) -> dict[str, str]:
    """The parameters of a MIME type, as the WHATWG MIME Sniffing Standard's "parse a MIME
    type" (section 4.4) reads them: names lower-cased, quoted values unescaped, the first
    of a repeated name kept. Empty for a value that is not ``type/subtype``."""
    essence, sep, rest = content_type.partition(";")
    kind, slash, subtype = essence.strip(_HTTP_WHITESPACE).partition("/")
    if not slash or not kind.strip(_HTTP_WHITESPACE) or not subtype.strip(_HTTP_WHITESPACE):
        return {}
    params: dict[str, str] = {}
    i, n = 0, len(rest)
    while sep and i < n:
        while i < n and rest[i] in _HTTP_WHITESPACE:
            i += 1
        start = i
        while i < n and rest[i] not in ";=":
            i += 1
        name = rest[start:i].lower()
        if i >= n:
            break
        if rest[i] == ";":
            i += 1
            continue
        i += 1  # past "="
        if i < n and rest[i] == '"':
            i += 1
            chars = []
            while i < n and rest[i] != '"':
                if rest[i] == "\\" and i + 1 < n:
                    i += 1
                chars.append(rest[i])
                i += 1
            value = "".join(chars)
            while i < n and rest[i] != ";":
                i += 1
        else:
            start = i
            while i < n and rest[i] != ";":
                i += 1
            value = rest[start:i].rstrip(_HTTP_WHITESPACE)
            if not value:
                i += 1
                continue
        i += 1  # past ";"
        if name and name not in params:
            params[name] = value
    return params


def charset_from_content_type(content_type: str | None) -> str | None:
    """The ``charset`` parameter of a Content-Type value as written (not resolved), or
    None. Parameters are read the WHATWG MIME Sniffing way, so ``notcharset=x`` or a
    ``charset`` in a quoted value of another parameter is not it."""
    if not content_type:
        return None
    return _parameters(content_type).get("charset") or None


# ------------------------------------------------------------------ the <meta> prescan
def _get_attribute(data: bytes, i: int) -> tuple[bytes, bytes, int] | None:
    """HTML Standard, "get an attribute" (prescan): ``(name, value, next position)``
    with ASCII letters lower-cased, or None when there is no further attribute."""
    n = len(data)
    while i < n and (data[i] in _WHITESPACE or data[i] == 0x2F):  # whitespace or "/"
        i += 1
    if i >= n or data[i] == 0x3E:  # ">"
        return None
    name = bytearray()
    while True:
        if i >= n:
            return None
        c = data[i]
        if c == 0x3D and name:  # "=" after a name
            i += 1
            break
        if c in _WHITESPACE:
            while i < n and data[i] in _WHITESPACE:
                i += 1
            if i >= n:
                return None
            if data[i] != 0x3D:
                return bytes(name), b"", i
            i += 1
            break
        if c in (0x2F, 0x3E):  # "/" or ">"
            return bytes(name), b"", i
        name.append(c + 0x20 if 0x41 <= c <= 0x5A else c)
        i += 1
    while i < n and data[i] in _WHITESPACE:
        i += 1
    if i >= n:
        return None
    value = bytearray()
    c = data[i]
    if c in (0x22, 0x27):  # a quoted value
        quote = c
        i += 1
        while i < n:
            c = data[i]
            if c == quote:
                return bytes(name), bytes(value), i + 1
            value.append(c + 0x20 if 0x41 <= c <= 0x5A else c)
            i += 1
        return None
    if c == 0x3E:
        return bytes(name), b"", i
    while i < n:
        c = data[i]
        if c in _WHITESPACE or c == 0x3E:
            return bytes(name), bytes(value), i
        value.append(c + 0x20 if 0x41 <= c <= 0x5A else c)
        i += 1
    return None


def _charset_in_meta_content(value: bytes) -> str | None:
    """HTML Standard, "algorithm for extracting a character encoding from a meta element"
    (the ``content`` of an ``http-equiv`` meta): the WHATWG name, or None."""
    i = 0
    while True:
        at = value.find(b"charset", i)
        if at < 0:
            return None
        i = at + 7
        while i < len(value) and value[i] in _WHITESPACE:
            i += 1
        if i < len(value) and value[i] == 0x3D:  # "="
            i += 1
            break
    while i < len(value) and value[i] in _WHITESPACE:
        i += 1
    if i >= len(value):
        return None
    if value[i] in (0x22, 0x27):
        end = value.find(value[i:i + 1], i + 1)
        return None if end < 0 else _whatwg_name(value[i + 1:end])
    end = i
    while end < len(value) and value[end] not in _WHITESPACE and value[end] != 0x3B:
        end += 1
    return _whatwg_name(value[i:end])


def _prescan(body: bytes) -> str | None:
    """HTML Standard, "prescan a byte stream to determine its encoding", over the first
    1024 bytes: the WHATWG name a ``<meta charset>`` or ``<meta http-equiv=content-type>``
    declares, with UTF-16 read as UTF-8 and x-user-defined as windows-1252; or None."""
    data = body[:_PRESCAN_BYTES]
    # an XML declaration in UTF-16 without a BOM ("<?x" with NULs) says UTF-16 itself
    if data.startswith(b"<\x00?\x00x\x00"):
        return "utf-16le"
    if data.startswith(b"\x00<\x00?\x00x"):
        return "utf-16be"
    n = len(data)
    i = 0
    while i < n:
        if data.startswith(b"<!--", i):
            # to the first ">" preceded by "--"; those dashes may be the opening ones
            end = data.find(b"-->", i + 2)
            if end < 0:
                return None
            i = end + 2
        elif (data[i:i + 5].lower() == b"<meta" and i + 5 < n
              and (data[i + 5] in _WHITESPACE or data[i + 5] == 0x2F)):
            i += 5
            seen: set[bytes] = set()
            got_pragma = False
            need_pragma: bool | None = None
            charset: str | None = None
            failed = False  # a charset attribute whose label is unknown
            while (attribute := _get_attribute(data, i)) is not None:
                name, value, i = attribute
                if name in seen:
                    continue
                seen.add(name)
                if name == b"http-equiv":
                    got_pragma = got_pragma or value == b"content-type"
                elif name == b"content":
                    found = _charset_in_meta_content(value)
                    if found is not None and charset is None and not failed:
                        charset, need_pragma = found, True
                elif name == b"charset":
                    charset = _whatwg_name(value)
                    failed = charset is None
                    need_pragma = False
            if need_pragma is not None and not (need_pragma and not got_pragma) and charset:
                if charset in ("utf-16le", "utf-16be"):
                    return "utf-8"  # a meta declaring UTF-16 was itself read as ASCII
                if charset == X_USER_DEFINED:
                    return "windows-1252"
                return charset
        elif data.startswith(b"<", i) and i + 1 < n and (
                chr(data[i + 1]).isascii() and chr(data[i + 1]).isalpha()
                or (data[i + 1] == 0x2F and i + 2 < n and chr(data[i + 2]).isascii()
                    and chr(data[i + 2]).isalpha())):
            while i < n and data[i] not in _WHITESPACE and data[i] != 0x3E:
                i += 1
            while (attribute := _get_attribute(data, i)) is not None:
                i = attribute[2]
        elif data.startswith((b"<!", b"</", b"<?"), i):
            end = data.find(b">", i + 1)
            if end < 0:
                return None
            i = end
        i += 1
    return None


# ------------------------------------------------------------------ sniffing and decoding
def _is_utf8(body: bytes) -> bool:
    """Valid UTF-8, allowing one character cut off at the very end (a capped body)."""
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as exc:
        return exc.reason == "unexpected end of data" and exc.end == len(body)
    return True


def _media_type(content_type: str | None) -> str:
    return (content_type or "").split(";", 1)[0].strip(_HTTP_WHITESPACE).lower()


def sniff_encoding(body: bytes, content_type: str | None = None) -> tuple[str, str]:
    """Return ``(codec, how)``: how is ``bom``, ``header``, ``meta``, ``detected`` (no
    declaration; the bytes are valid UTF-8) or ``default`` (no declaration; windows-1252).

    ``codec`` is what ``codec_for`` gives: a Python codec name, ``"replacement"`` or
    ``"x-user-defined"``. A declared label outside the WHATWG table is skipped. The
    ``<meta>`` prescan runs for HTML (and for an unknown type), not for ``text/plain``."""
    # HTML Standard 13.2.3.2 step 1 / Encoding Standard "BOM sniff": the BOM beats all
    if body.startswith(codecs.BOM_UTF8):
        return "utf-8-sig", "bom"
    if body.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return "utf-16", "bom"  # Python's utf-16 reads the BOM's byte order and drops it
    header = codec_for(charset_from_content_type(content_type))
    if header is not None:
        return header, "header"
    media = _media_type(content_type)
    if not media or media in _HTML_TYPES:
        meta = _prescan(body)
        if meta is not None:
            return _codec_of_name(meta), "meta"
    if _is_utf8(body):
        return "utf-8", "detected"
    # HTML Standard 13.2.3.2: the locale's default; windows-1252 for most locales
    return "cp1252", "default"


def decode_text(body: bytes, content_type: str | None = None) -> tuple[str, str]:
    """Decode ``body`` to text as a browser would; returns ``(text, codec)``.

    Bad bytes become U+FFFD; nothing raises. ``codec == "replacement"`` means the page
    declared an encoding the WHATWG standard replaces whole by one U+FFFD (the text is that
    one character, or empty for an empty body): the page has no readable text."""
    codec, _how = sniff_encoding(body, content_type)
    if codec == REPLACEMENT:
        # Encoding Standard section 14.1 (replacement decoder): one error for any input,
        # nothing for none (section number from memory)
        return ("\ufffd" if body else ""), REPLACEMENT
    if codec == X_USER_DEFINED:
        return codecs.charmap_decode(body, "replace", _X_USER_DEFINED)[0], codec
    if codec == "cp1252":
        return codecs.charmap_decode(body, "replace", _WINDOWS_1252)[0], codec
    try:
        return body.decode(codec, errors="replace"), codec
    except (LookupError, UnicodeError, ValueError):  # not expected: every codec is known
        return codecs.charmap_decode(body, "replace", _WINDOWS_1252)[0], "cp1252"
