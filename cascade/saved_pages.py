"""Saved pages for training, reports and explanations: a labelled file's ``page`` column
names an HTML file (``.gz`` accepted) under a pages folder, or its ``text`` column holds the
page text. One reader for every command."""

from __future__ import annotations

import gzip
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

from cascade.errors import InputFormatError
from cascade.extract import PageText, extract

__all__ = ["read_page_file", "row_pages"]


def read_page_file(path: str | Path, url: str | None = None) -> PageText:
    """Extract a saved HTML page (gzip-compressed or not); ``InputFormatError`` if unreadable."""
    path = Path(path)
    try:
        raw = path.read_bytes()
        if raw[:2] == b"\x1f\x8b":
            raw = gzip.decompress(raw)
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise InputFormatError(f"{path}: cannot read the page: {exc}") from None
    return extract(raw, url=url, content_type="text/html")


def row_pages(extras: Sequence[Mapping[str, str]], base: str | Path,
              warn: Callable[[str], None] | None = None, max_warnings: int = 5
              ) -> list[PageText | None]:
    """Each row's page: its ``page`` column (a file under ``base``) or ``text`` column;
    None where neither. An unreadable page file is reported through ``warn`` (the first
    ``max_warnings``, then a count) and its row gets None: that row trains or measures the
    URL model only."""
    say = warn or (lambda _msg: None)
    pages: list[PageText | None] = []
    missing = 0
    for extra in extras:
        name, text = extra.get("page"), extra.get("text")
        if name:
            try:
                pages.append(read_page_file(Path(base) / name))
            except InputFormatError as exc:
                missing += 1
                if missing <= max_warnings:
                    say(f"page not used: {exc}")
                pages.append(None)
        elif text:
            pages.append(extract(text, content_type="text/plain"))
        else:
            pages.append(None)
    if missing:
        say(f"{missing} page files could not be read; those rows use the URL model only")
    return pages
