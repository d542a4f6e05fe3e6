"""From input records to the URLs a run works on: normalize, count bad URLs, merge repeats.

A lookup log names the same page many ways (case, default ports, escapes): the run works
on normalized URLs, with the lookup counts of every spelling summed, so a URL is scored,
planned and fetched once.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from cascade.errors import InvalidURL
from cascade.io import InputRecord, ReadStats
from cascade.urls import UrlKey, normalize

__all__ = ["Lookup", "keyed_records", "merge_lookups"]


@dataclass
class Lookup:
    """One normalized URL of a run: its key, summed lookup count, and the first record."""

    key: UrlKey
    count: int
    first: InputRecord


def keyed_records(records: Iterable[InputRecord], stats: ReadStats
                  ) -> Iterator[tuple[InputRecord, UrlKey]]:
    """Normalize each record's URL; a bad URL is counted as a bad line and skipped."""
    for rec in records:
        try:
            yield rec, normalize(rec.url)
        except InvalidURL as exc:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, f"invalid URL: {exc.reason}")


def merge_lookups(keyed: Iterable[tuple[InputRecord, UrlKey]]) -> list[Lookup]:
    """One entry per normalized URL, in order of first appearance, counts summed."""
    merged: dict[str, Lookup] = {}
    for rec, key in keyed:
        entry = merged.get(key.url)
        if entry is None:
            merged[key.url] = Lookup(key, rec.count, rec)
        else:
            entry.count += rec.count
    return list(merged.values())
