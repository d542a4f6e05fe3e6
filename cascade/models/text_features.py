"""Hashed, field-tagged word features for page text.

A word in the title is not the same feature as the same word in the body: each field
(``title``, ``desc``, ``head``, ``body``, ``anchor``, ``link``) hashes its words with its own
tag. Unigrams are hashed once each (keyed BLAKE2b, cached: words repeat across pages) and
bigrams are mixed from their two unigram hashes in numpy, so a long page costs one regex
pass and a few array operations, not a Python call per bigram.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from hashlib import blake2b
from typing import Protocol

import numpy as np

__all__ = [
    "FIELDS",
    "FIELD_INDEX",
    "PageLike",
    "TextSettings",
    "WordHasher",
    "field_names",
    "field_words",
    "page_word_count",
    "words",
]

FIELDS = ("title", "desc", "head", "body", "anchor", "link", "chars")
FIELD_INDEX = {name: i for i, name in enumerate(FIELDS)}
_WORD = re.compile(r"[^\W_]+", re.UNICODE)
_MAX_WORD_CHARS = 40
_MIX = np.uint64(0x9E3779B97F4A7C15)  # odd: multiplicative hashing
_P = np.uint64(0x100000001B3)
_BIGRAM_SALT = np.uint64(0xA24BAED4963EE407)


class PageLike(Protocol):
    """What the page model reads from an extracted page (``cascade.extract.PageText``)."""

    title: str
    description: str
    keywords: tuple[str, ...]
    headings: tuple[str, ...]
    body: str
    anchors: tuple[str, ...]
    link_domains: tuple[str, ...]


@dataclass(frozen=True)
class TextSettings:
    """How much of each field is read (words kept from the start of each field)."""

    max_body_words: int = 3000
    max_field_words: int = 200
    bigrams: bool = True
    short_page_words: int = 40  # below this many words, character n-grams are added
    char_ngram_range: tuple[int, int] = (3, 5)
    max_char_text: int = 600


def words(text: str, limit: int) -> list[str]:
    """Lower-cased words (letters and digits; runs of digits become ``0``), at most ``limit``."""
    out: list[str] = []
    for m in _WORD.finditer(text.lower()):
        w = m.group()
        if len(w) > _MAX_WORD_CHARS:
            continue
        if w.isdigit():
            w = "0"
        out.append(w)
        if len(out) >= limit:
            break
    return out


def field_words(page: PageLike, settings: TextSettings) -> list[tuple[str, list[str]]]:
    """The word lists of each field of ``page``; link domains are whole tokens."""
    cap = settings.max_field_words
    desc = " ".join((page.description, *page.keywords))
    out = [
        ("title", words(page.title, cap)),
        ("desc", words(desc, cap)),
        ("head", words(" . ".join(page.headings), cap)),
        ("body", words(page.body, settings.max_body_words)),
        ("anchor", words(" . ".join(page.anchors), settings.max_field_words * 2)),
        ("link", [d.lower() for d in page.link_domains[:cap]]),
    ]
    return out


class WordHasher:
    """Keyed unigram hashes with a bounded per-seed cache."""

    def __init__(self, seed: int) -> None:
        self.seed = seed
        self._key = seed.to_bytes(8, "little", signed=True)
        self._cache: dict[tuple[str, str], int] = {}

    def unigram(self, field_name: str, word: str) -> int:
        key = (field_name, word)
        value = self._cache.get(key)
        if value is None:
            if len(self._cache) > 1 << 21:
                self._cache.clear()
            data = (field_name + "\x1f" + word).encode("utf-8", "surrogatepass")
            value = int.from_bytes(blake2b(data, digest_size=8, key=self._key).digest(),
                                   "little") or 1
            self._cache[key] = value
        return value

    def field_hashes(self, field_name: str, tokens: Sequence[str], bigrams: bool
                     ) -> np.ndarray:
        """Hashes of the unigrams, then (if asked) the bigrams, of one field."""
        uni = np.fromiter((self.unigram(field_name, w) for w in tokens), dtype=np.uint64,
                          count=len(tokens))
        if not bigrams or field_name == "link" or len(uni) < 2:
            return uni
        bi = ((uni[:-1] * _P) ^ (uni[1:] + _BIGRAM_SALT)) * _MIX
        return np.concatenate((uni, bi))


def field_names(field_name: str, tokens: Sequence[str], bigrams: bool) -> list[str]:
    """Readable names, in the same order as ``WordHasher.field_hashes``."""
    names = [f"{field_name}:{w}" for w in tokens]
    if bigrams and field_name != "link" and len(tokens) >= 2:
        names.extend(f"{field_name}:{a} {b}" for a, b in zip(tokens[:-1], tokens[1:],
                                                               strict=True))
    return names


def page_word_count(page: PageLike, settings: TextSettings | None = None) -> int:
    """Words the page model reads across all fields (title, description, headings, body,
    anchors): the measure of whether a page says enough to be fused. A page with a thin body
    can still carry its category in its title and links."""
    per_field = field_words(page, settings or TextSettings())
    return sum(len(w) for f, w in per_field if f != "link")
