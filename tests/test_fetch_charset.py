"""Charset detection and decoding as a browser does it (pure: no server).

References: the WHATWG Encoding Standard (labels, decoders) and the HTML Standard, section
13.2.3.2 "Determining the character encoding" (BOM, then transport, then the ``<meta>``
prescan, then a default).
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from webencodings.labels import LABELS

from cascade.fetch.charset import (
    charset_from_content_type,
    codec_for,
    decode_text,
    sniff_encoding,
)


# ---------------------------------------------------------------- labels
@pytest.mark.parametrize("label", ["utf-7", "unicode_escape", "raw_unicode_escape", "cp037",
                                   "cp500", "base64", "rot13", "zlib", "idna", "punycode",
                                   "utf-32", "undefined", "mbcs", "hex"])
def test_labels_outside_the_whatwg_table_are_not_used(label: str) -> None:
    # WHATWG Encoding Standard, section 4.2 Names and labels: none of these is a label
    assert codec_for(label) is None
    body = b"+AGEAYgBj- <p>caf\xc3\xa9</p>"
    text, codec = decode_text(body, f"text/html; charset={label}")
    assert codec == "utf-8" and text == "+AGEAYgBj- <p>caf\u00e9</p>"  # not decoded as UTF-7


@pytest.mark.parametrize("label", ["utf-7", "unicode_escape", "cp037"])
def test_a_meta_label_outside_the_table_is_ignored_too(label: str) -> None:
    body = f'<meta charset="{label}"><p>caf\u00e9</p>'.encode()
    assert decode_text(body) == (f'<meta charset="{label}"><p>caf\u00e9</p>', "utf-8")


@pytest.mark.parametrize(
    ("label", "codec"),
    [
        # WHATWG Encoding Standard, section 4.2 Names and labels: "latin1" -> windows-1252
        ("latin1", "cp1252"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "iso-8859-1" -> windows-1252
        ("iso-8859-1", "cp1252"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "ascii" -> windows-1252
        ("ascii", "cp1252"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "utf8" -> UTF-8
        ("utf8", "utf-8"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "unicode-1-1-utf-8" -> UTF-8
        ("unicode-1-1-utf-8", "utf-8"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "ks_c_5601-1987" -> EUC-KR,
        # whose decoder is the Windows (UHC) superset, Python's cp949
        ("ks_c_5601-1987", "cp949"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "x-sjis" -> Shift_JIS,
        # whose index holds the Windows rows, Python's cp932
        ("x-sjis", "cp932"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "gb2312" -> GBK; section
        # 10.1.1: GBK's decoder is gb18030's
        ("gb2312", "gb18030"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "iso-8859-9" -> windows-1254
        ("iso-8859-9", "cp1254"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "tis-620" -> windows-874
        ("tis-620", "cp874"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "utf-16" -> UTF-16LE
        ("utf-16", "utf-16-le"),
        # WHATWG Encoding Standard, section 4.2 Names and labels: "iso-2022-kr" and
        # "hz-gb-2312" -> replacement
        ("iso-2022-kr", "replacement"),
        ("hz-gb-2312", "replacement"),
        # WHATWG Encoding Standard, section 4.2: ASCII case-insensitive, ASCII whitespace
        # stripped ("get an encoding")
        ("  UTF-8\t", "utf-8"),
        ("Windows-1251", "cp1251"),
    ],
)
def test_whatwg_labels_map_to_the_standards_encoding(label: str, codec: str) -> None:
    assert codec_for(label) == codec


def test_non_ascii_case_folding_does_not_make_a_label() -> None:
    # WHATWG Encoding Standard, section 4.2 ("get an encoding"): ASCII case-insensitive only;
    # U+212A KELVIN SIGN lower-cases to "k" in Unicode, but "\u212aoi8-r" is no label
    assert codec_for("\u212aoi8-r") is None
    assert codec_for("KOI8-R") == "koi8-r"


def test_every_whatwg_encoding_has_a_decoder() -> None:
    # every encoding name of the standard's label table (as webencodings ships it) decodes
    for label in LABELS:
        codec = codec_for(label)
        assert codec is not None, label
        text, _ = decode_text(b"<p>abc \x80\xff</p>", f"text/html; charset={label}")
        assert isinstance(text, str)


# ---------------------------------------------------------------- nothing declared
def test_undeclared_latin1_bytes_decode_as_windows_1252() -> None:
    # HTML Standard 13.2.3.2: with nothing declared, the locale default, windows-1252 for
    # most locales (a detector once read these bytes as "cr\u010dme")
    assert decode_text(b"cr\xe8me") == ("cr\u00e8me", "cp1252")
    assert decode_text(b"<p>caf\xe9 cr\xe8me \x80</p>", "text/html") == (
        "<p>caf\u00e9 cr\u00e8me \u20ac</p>", "cp1252")


def test_undeclared_valid_utf8_is_utf8() -> None:
    body = "cr\u00e8me br\u00fbl\u00e9e \u2713".encode()
    assert sniff_encoding(body) == ("utf-8", "detected")
    assert decode_text(body) == ("cr\u00e8me br\u00fbl\u00e9e \u2713", "utf-8")


def test_a_utf8_character_cut_at_the_end_is_still_utf8() -> None:
    body = "caf\u00e9 \u2713".encode()[:-1]  # a capped body can end inside a character
    assert sniff_encoding(body) == ("utf-8", "detected")
    assert decode_text(body)[0].startswith("caf\u00e9 ")


def test_windows_1252_bytes_python_leaves_undefined_map_to_c1_controls() -> None:
    # WHATWG Encoding Standard, index-windows-1252 (from memory): 0x81, 0x8D, 0x8F, 0x90 and
    # 0x9D map to U+0081, U+008D, U+008F, U+0090, U+009D; Python's cp1252 has no mapping
    text, codec = decode_text(b"\x81\x8d\x8f\x90\x9d\x80", "text/html; charset=windows-1252")
    assert codec == "cp1252" and text == "\x81\x8d\x8f\x90\x9d\u20ac"


def test_empty_body_decodes_to_empty_text() -> None:
    assert decode_text(b"") == ("", "utf-8")


# ---------------------------------------------------------------- order of the sources
def test_the_bom_beats_the_header() -> None:
    # HTML Standard 13.2.3.2 step 1 (BOM sniff) comes before the transport layer's encoding
    body = b"\xef\xbb\xbf<p>\xe2\x9c\x93</p>"
    assert sniff_encoding(body, "text/html; charset=iso-8859-1") == ("utf-8-sig", "bom")
    assert decode_text(body, "text/html; charset=iso-8859-1") == ("<p>\u2713</p>", "utf-8-sig")


@pytest.mark.parametrize("bom", [b"\xff\xfe", b"\xfe\xff"])
def test_a_utf16_bom_beats_the_header(bom: bytes) -> None:
    body = bom + "<p>\u00e9</p>".encode("utf-16-le" if bom == b"\xff\xfe" else "utf-16-be")
    assert decode_text(body, "text/html; charset=windows-1252") == ("<p>\u00e9</p>", "utf-16")


def test_the_header_beats_meta() -> None:
    # HTML Standard 13.2.3.2: the transport layer's encoding before the prescan
    body = '<meta charset="windows-1251"><p>caf\u00e9</p>'.encode("latin-1")
    assert sniff_encoding(body, "text/html; charset=iso-8859-2") == ("iso8859-2", "header")


def test_an_unknown_header_label_falls_through_to_meta() -> None:
    body = '<meta charset="windows-1251"><p>\u043d\u043e\u0432\u043e\u0441\u0442\u0438</p>'
    text, codec = decode_text(body.encode("cp1251"), "text/html; charset=utf-7")
    assert codec == "cp1251" and "\u043d\u043e\u0432\u043e\u0441\u0442\u0438" in text


def test_an_unknown_meta_label_falls_through_to_the_default() -> None:
    assert decode_text(b'<meta charset="cp037"><p>cr\xe8me</p>') == (
        '<meta charset="cp037"><p>cr\u00e8me</p>', "cp1252")


def test_meta_is_not_read_for_text_plain() -> None:
    # HTML Standard 13.2.3.2 is for HTML documents; a text file naming a charset in its text
    # does not declare one
    assert sniff_encoding(b"<meta charset=koi8-r>", "text/plain") == ("utf-8", "detected")


# ---------------------------------------------------------------- the <meta> prescan
@pytest.mark.parametrize(
    ("body", "codec"),
    [
        (b"<META CHARSET=KOI8-R>", "koi8-r"),
        (b"<meta charset='koi8-r'/>", "koi8-r"),
        (b'<meta http-equiv="Content-Type" content="text/html; charset=koi8-r">', "koi8-r"),
        (b'<meta content="text/html; charset=\'koi8-r\'" http-equiv=content-type>', "koi8-r"),
        (b"<meta content='charset = koi8-r;x'  http-equiv='content-type'>", "koi8-r"),
        # the first meta with a known label wins
        (b'<meta charset="bogus"><meta charset="koi8-r"><meta charset="iso-8859-2">', "koi8-r"),
        # a repeated attribute: the first one counts
        (b'<meta charset="koi8-r" charset="iso-8859-2">', "koi8-r"),
    ],
)
def test_prescan_reads_meta_charset_and_http_equiv(body: bytes, codec: str) -> None:
    # HTML Standard, "prescan a byte stream to determine its encoding"
    assert sniff_encoding(body) == (codec, "meta")


@pytest.mark.parametrize(
    "body",
    [
        b'<meta content="text/html; charset=koi8-r">',  # no http-equiv: the pragma is needed
        b'<meta http-equiv="refresh" content="0; charset=koi8-r">',  # not content-type
        b"<!-- <meta charset=koi8-r> --><p>x</p>",  # inside a comment
        b'<p title="<meta charset=koi8-r>">x</p>',  # inside another tag's attribute value
        b"<metacharset=koi8-r>",  # not a meta tag
        b"x" * 1024 + b"<meta charset=koi8-r>",  # beyond the first 1024 bytes
    ],
)
def test_prescan_ignores_what_is_not_a_declaration(body: bytes) -> None:
    # HTML Standard, "prescan a byte stream to determine its encoding"
    assert sniff_encoding(body)[1] != "meta"


def test_a_comment_may_end_on_its_own_opening_dashes() -> None:
    # HTML Standard, prescan: the "--" before ">" may be the "<!--" ones, so "<!-->" ends
    assert sniff_encoding(b"<!--><meta charset=koi8-r>") == ("koi8-r", "meta")


def test_a_meta_utf16_means_utf8() -> None:
    # HTML Standard, prescan: a meta that declares UTF-16 was read as ASCII, so it is UTF-8
    body = '<meta charset="utf-16"><p>\u2713</p>'.encode()
    assert decode_text(body) == ('<meta charset="utf-16"><p>\u2713</p>', "utf-8")
    assert sniff_encoding(b'<meta charset="utf-16be">') == ("utf-8", "meta")


def test_a_meta_x_user_defined_means_windows_1252() -> None:
    # HTML Standard, prescan: x-user-defined from meta is read as windows-1252
    assert decode_text(b'<meta charset="x-user-defined"><p>\xe8</p>') == (
        '<meta charset="x-user-defined"><p>\u00e8</p>', "cp1252")


def test_x_user_defined_from_the_header_maps_high_bytes_to_the_private_use_area() -> None:
    # WHATWG Encoding Standard, x-user-defined decoder: 0x80-0xFF -> U+F780-U+F7FF
    assert decode_text(b"a\x80\xff", "text/html; charset=x-user-defined") == (
        "a\uf780\uf7ff", "x-user-defined")


# ---------------------------------------------------------------- replacement
@pytest.mark.parametrize("label", ["iso-2022-kr", "hz-gb-2312", "iso-2022-cn", "csiso2022kr"])
def test_replacement_labels_decode_to_one_replacement_character(label: str) -> None:
    # WHATWG Encoding Standard, section 4.2: these labels name the replacement encoding,
    # whose decoder gives a single U+FFFD for the whole input
    body = b"\x1b$)C\x0e!!\x0f<p>many bytes</p>" * 10
    assert decode_text(body, f"text/html; charset={label}") == ("\ufffd", "replacement")
    assert decode_text(f'<meta charset="{label}"><p>x</p>'.encode()) == ("\ufffd",
                                                                        "replacement")


def test_replacement_of_an_empty_body_is_empty() -> None:
    assert decode_text(b"", "text/html; charset=iso-2022-kr") == ("", "replacement")


# ---------------------------------------------------------------- Content-Type parameters
@pytest.mark.parametrize(
    ("content_type", "charset"),
    [
        ("text/html; charset=utf-8", "utf-8"),
        ("text/html;charset=\"koi8-r\"", "koi8-r"),
        ("text/html; CHARSET=koi8-r ; x=y", "koi8-r"),
        ("text/html; notcharset=koi8-r", None),
        ('text/html; title="charset=koi8-r"', None),
        ("text/html; charset=koi8-r; charset=utf-8", "koi8-r"),  # the first one counts
        ("charset=utf-8", None),  # not a MIME type
        ("text/html", None),
        (None, None),
    ],
)
def test_charset_parameter_is_read_the_mime_sniffing_way(content_type: str | None,
                                                         charset: str | None) -> None:
    # WHATWG MIME Sniffing Standard, section 4.4 "parse a MIME type"
    assert charset_from_content_type(content_type) == charset


# ---------------------------------------------------------------- never raises
@given(st.binary(max_size=2048), st.sampled_from([None, "text/html", "text/plain",
                                                  "text/html; charset=utf-16",
                                                  "text/html; charset=iso-2022-jp",
                                                  "text/html; charset=shift_jis",
                                                  "text/html; charset=\"", "text/html;;="]))
def test_decoding_never_raises(body: bytes, content_type: str | None) -> None:
    text, codec = decode_text(body, content_type)
    assert isinstance(text, str) and isinstance(codec, str)


@given(st.text(alphabet=st.sampled_from('<>!-/?="\' \tmetachrsKOI8-R'), max_size=300))
def test_prescan_never_raises_on_tag_soup(markup: str) -> None:
    codec, how = sniff_encoding(markup.encode("ascii"))
    assert how in ("meta", "detected")
    assert codec


def test_an_xml_declaration_in_utf16_without_a_bom_declares_utf16() -> None:
    # HTML Standard, prescan: "<?x" as UTF-16LE or UTF-16BE bytes gives that encoding (the
    # fetcher's binary check refuses such a body before it gets here)
    assert sniff_encoding("<?xml version='1.0'?>".encode("utf-16-le")) == ("utf-16-le", "meta")
    assert sniff_encoding("<?xml version='1.0'?>".encode("utf-16-be")) == ("utf-16-be", "meta")
