"""Reading URL lists and writing results: plain text, CSV/TSV and JSON Lines, gzipped or not.

Readers stream (constant memory, whatever the file size) and never stop on a bad line: it is
counted in ``ReadStats`` with a reason and skipped. Only a file that cannot be read at all
raises ``InputFormatError``. Writers on a path are atomic: the result appears under its final
name only once complete. ``Progress`` reports on stderr: a tqdm bar on a terminal, plain
lines elsewhere.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import errno
import gzip
import io
import json
import math
import os
import re
import sys
import time
import zlib
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import IO, Any, TextIO, TypeAlias

from tqdm import tqdm

from cascade.errors import InputFormatError

__all__ = [
    "MAX_LINE_CHARS",
    "BadLine",
    "InputRecord",
    "Progress",
    "ReadStats",
    "RecordReader",
    "RecordWriter",
    "open_writer",
    "read_records",
]

MAX_LINE_CHARS = 64 * 1024
"""Longest accepted line (characters, terminator excluded); longer lines are bad lines."""
MAX_CSV_ROW_LINES = 64
"""Most physical lines one CSV row (a quoted field with newlines) may span."""
SAMPLE_CHARS = 200
GZIP_MAGIC = b"\x1f\x8b"
SNIFF_BYTES = 8192
"""Bytes looked at to tell text from binary (and UTF-16 by its byte-order mark)."""

InputSource: TypeAlias = "str | os.PathLike[str] | IO[str] | IO[bytes] | Iterable[str]"

_FORMAT_NAMES = {
    "txt": "txt",
    "text": "txt",
    "plain": "txt",
    "csv": "csv",
    "tsv": "tsv",
    "jsonl": "jsonl",
    "ndjson": "jsonl",
}
_SUFFIXES = (
    (".txt", "txt"),
    (".csv", "csv"),
    (".tsv", "tsv"),
    (".jsonl", "jsonl"),
    (".ndjson", "jsonl"),
)
_DELIMITERS = {"csv": ",", "tsv": "\t"}
_KNOWN_COLUMNS = ("url", "label", "count", "seen_at")
_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_TOO_LONG = f"line longer than {MAX_LINE_CHARS} characters"


# --------------------------------------------------------------------------- records, stats


@dataclass(frozen=True)
class InputRecord:
    """One URL read from an input file, with what the file said about it."""

    line_no: int
    url: str
    label: str | None = None
    count: int = 1
    seen_at: str | None = None
    extra: dict[str, str] = field(default_factory=dict, hash=False)


@dataclass
class BadLine:
    """A skipped input line: where it was, how it started, why it was refused."""

    line_no: int
    text: str
    reason: str

    def __post_init__(self) -> None:
        self.text = _clip(self.text)


@dataclass
class ReadStats:
    """Counts for one read: physical lines, records yielded, bad lines (first few kept)."""

    lines: int = 0
    records: int = 0
    bad: int = 0
    samples: list[BadLine] = field(default_factory=list)
    max_samples: int = 10
    damaged: bool = False  # the file broke off (e.g. a truncated .gz) after good lines

    def add_bad(self, line_no: int, text: str, reason: str) -> None:
        """Count a bad line; keep it as a sample while there is room."""
        self.bad += 1
        if len(self.samples) < self.max_samples:
            self.samples.append(BadLine(line_no, text, reason))

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready summary, for reports and logs."""
        return {
            "lines": self.lines,
            "records": self.records,
            "bad": self.bad,
            "damaged": self.damaged,
            "samples": [dataclasses.asdict(s) for s in self.samples],
        }


def _clip(text: str) -> str:
    text = text.rstrip("\r\n")
    return text if len(text) <= SAMPLE_CHARS else text[:SAMPLE_CHARS]


# --------------------------------------------------------------------------- low-level input


class _Prefixed(io.RawIOBase):
    """Replays a few bytes already read (to look for the gzip magic), then reads on.

    Works on pipes and other unseekable streams; closing it never closes the source.
    """

    def __init__(self, source: Any, prefix: bytes) -> None:
        super().__init__()
        self._prefix = prefix
        self._read = getattr(source, "read1", None) or source.read

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        if self._prefix:
            n = min(len(buffer), len(self._prefix))
            buffer[:n] = self._prefix[:n]
            self._prefix = self._prefix[n:]
            return n
        data = self._read(len(buffer))
        if not data:
            return 0
        n = len(data)
        buffer[:n] = data
        return n


class _IterText:
    """A ``readline(limit)`` view over an iterable of lines (str or bytes), read lazily."""

    def __init__(self, lines: Iterable[Any]) -> None:
        self._it = iter(lines)
        self._queue: deque[str] = deque()

    def readline(self, limit: int = -1) -> str:
        while not self._queue:
            try:
                item = next(self._it)
            except StopIteration:
                return ""
            if isinstance(item, bytes | bytearray):
                item = bytes(item).decode("utf-8", errors="replace")
            elif not isinstance(item, str):
                item = str(item)
            parts = item.splitlines(keepends=True) or ["\n"]
            if not parts[-1].endswith(("\n", "\r")):
                parts[-1] += "\n"
            self._queue.extend(parts)
        line = self._queue[0]
        if 0 <= limit < len(line):
            self._queue[0] = line[limit:]
            return line[:limit]
        self._queue.popleft()
        return line


class _TooLong(Exception):  # noqa: N818 - internal signal, never escapes this module
    def __init__(self, line_no: int, head: str) -> None:
        super().__init__(line_no)
        self.line_no = line_no
        self.head = head


class _Lines:
    """Physical lines with numbers, each at most ``MAX_LINE_CHARS``, plus a replay queue.

    A longer line is read through in bounded chunks (never held whole) and reported by
    raising ``_TooLong`` after it has been consumed, so reading can simply go on.
    """

    def __init__(self, text: Any, stats: ReadStats) -> None:
        self._f = text
        self._stats = stats
        self._replay: deque[tuple[int, str]] = deque()
        self._swallow_lf = False
        self.physical = 0
        self.line_no = 0

    def unread(self, lines: Iterable[tuple[int, str]]) -> None:
        """Put lines back, to be returned (in order) before anything new."""
        self._replay.extendleft(reversed(list(lines)))

    def readline(self) -> str | None:
        """The next line with its terminator, or None at the end."""
        if self._replay:
            self.line_no, line = self._replay.popleft()
            return line
        limit = MAX_LINE_CHARS + 2
        while True:
            line = self._f.readline(limit)
            if not line:
                return None
            if self._swallow_lf:
                self._swallow_lf = False
                if line == "\n":  # the rest of a "\r\n" that the size limit cut in two
                    continue
            break
        self.physical += 1
        self._stats.lines += 1
        self.line_no = self.physical
        if self.physical == 1 and line.startswith("\ufeff"):
            line = line[1:]
        if len(line) > MAX_LINE_CHARS and len(line.rstrip("\r\n")) > MAX_LINE_CHARS:
            head, last, size = line[:SAMPLE_CHARS], line, limit
            while not last.endswith(("\n", "\r")):
                last = self._f.readline(MAX_LINE_CHARS)
                size = MAX_LINE_CHARS
                if not last:
                    break
            self._swallow_lf = len(last) == size and last.endswith("\r")
            raise _TooLong(self.line_no, head)
        return line


# --------------------------------------------------------------------------- field parsing


def _parse_count(value: Any) -> int | str:
    """A count as a non-negative int, or the reason it is not one. Missing means 1."""
    if value is None:
        return 1
    if isinstance(value, bool):
        return f"count must be a whole number, not {json.dumps(value)}"
    if isinstance(value, int):
        number: int | float = value
    elif isinstance(value, float):
        number = value
    elif isinstance(value, str):
        text = value.strip()
        if not text:
            return 1
        if not _NUMBER.fullmatch(text):
            return f"count {_clip(text)!r} is not a number"
        try:
            number = int(text) if text.lstrip("+-").isdigit() else float(text)
        except ValueError:
            return f"count {_clip(text)[:40]!r} is not a usable number"
    else:
        return f"count must be a whole number, not {type(value).__name__}"
    if isinstance(number, float):
        if not (math.isfinite(number) and number.is_integer()):
            return f"count {value!r} is not a whole number"
        number = int(number)
    if number < 0:
        return f"count {value!r} is negative"
    return number


def _optional_text(value: Any) -> str | None:
    if value is None:
        return None
    text = value.strip() if isinstance(value, str) else json.dumps(value, ensure_ascii=False)
    return text or None


def _make_record(
    line_no: int,
    url: Any,
    label: Any = None,
    count: Any = None,
    seen_at: Any = None,
    extra: dict[str, str] | None = None,
) -> InputRecord | str:
    """Validate the fields of one line: a record, or the reason the line is bad."""
    if url is None:
        return "missing url"
    if not isinstance(url, str):
        return f"url must be a string, not {type(url).__name__}"
    url = url.strip()
    if not url:
        return "missing url"
    if "\ufffd" in url:
        return "url contains bytes that are not valid UTF-8"
    if label is not None and not isinstance(label, str):
        return f"label must be a string, not {type(label).__name__}"
    if label is not None and "\ufffd" in label:  # else "Jeux vid\ufffdo" becomes a category
        return "label contains bytes that are not valid UTF-8"
    parsed = _parse_count(count)
    if isinstance(parsed, str):
        return parsed
    when = parse_seen_at(seen_at)
    if isinstance(when, ValueError):
        return str(when)
    return InputRecord(
        line_no=line_no,
        url=url,
        label=_optional_text(label),
        count=parsed,
        seen_at=when,
        extra=extra or {},
    )


_EPOCH = re.compile(r"^[+-]?\d{9,11}(?:\.\d+)?$")


def parse_seen_at(value: Any) -> str | None | ValueError:
    """A ``seen_at`` value as ISO 8601 UTC (``2026-10-09T20:20:40Z``): ISO 8601 dates and
    times (RFC 3339 profile; an offset is converted to UTC, no offset means UTC) or epoch
    seconds; empty is None; anything else (``yesterday``) is returned as a ``ValueError``
    so the line is counted as bad rather than sorted as text."""
    import datetime as dt

    text = _optional_text(value)
    if text is None:
        return None
    try:
        if _EPOCH.match(text):
            when = dt.datetime.fromtimestamp(float(text), tz=dt.UTC)
        else:
            when = dt.datetime.fromisoformat(text.replace("z", "Z"))
            if when.tzinfo is None:
                when = when.replace(tzinfo=dt.UTC)
    except (ValueError, OverflowError, OSError):
        return ValueError(f"seen_at {text[:40]!r} is not an ISO 8601 time or epoch seconds")
    return when.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


# --------------------------------------------------------------------------- format detection


def _format_from_name(name: str) -> str | None:
    lower = name.lower()
    if lower.endswith(".gz"):
        lower = lower[:-3]
    for suffix, fmt in _SUFFIXES:
        if lower.endswith(suffix):
            return fmt
    return None


def _normalise_format(fmt: str) -> str:
    key = fmt.strip().lower().lstrip(".").removesuffix(".gz")
    if key not in _FORMAT_NAMES:
        raise InputFormatError(f"unknown input format {fmt!r}; use one of txt, csv, tsv, jsonl")
    return _FORMAT_NAMES[key]


def _header_fields(line: str, delimiter: str) -> list[str]:
    try:
        row = next(csv.reader([line], delimiter=delimiter), [])
    except csv.Error:
        return []
    return [f.strip().lower() for f in row]


def _sniff(line: str, url_name: str = "url",
           extra: str | None = None) -> tuple[str, str | None]:
    """Guess the format (and a CSV delimiter other than the format's own) from the first
    significant line of a file: a header naming the URL column makes it CSV/TSV."""
    text = line.strip()
    if text.startswith("{"):
        return "jsonl", None
    if text.lower() in (url_name, f'"{url_name}"'):
        return "csv", None
    candidates = [("\t", "tsv"), (",", "csv"), (";", "csv"), ("|", "csv")]
    if extra and extra not in "\t,;|":
        candidates.insert(0, (extra, "csv"))
    for delimiter, fmt in candidates:
        if delimiter in text:
            fields = _header_fields(text, delimiter)
            if url_name in fields and not any("://" in f for f in fields):
                return fmt, (delimiter if delimiter not in "\t," else None)
    if text.startswith('"'):
        return "jsonl", None
    return "txt", None


# --------------------------------------------------------------------------- readers


class _CsvFeed:
    """Feeds physical lines to ``csv.reader`` and remembers the lines of the current row.

    When a row breaks (an unterminated quote, a too-long line, a csv error), only its first
    line is refused; the lines it swallowed are replayed and parsed again.
    """

    def __init__(self, src: _Lines) -> None:
        self.src = src
        self.begin_row()

    def begin_row(self) -> None:
        self.lines: list[tuple[int, str]] = []
        self.chars = 0
        self.long: _TooLong | None = None
        self.eof_in_row = False

    def __iter__(self) -> _CsvFeed:
        return self

    def __next__(self) -> str:
        while True:
            try:
                line = self.src.readline()
            except _TooLong as exc:
                self.long = exc
                raise _RowBroken("unterminated quoted field") from None
            if line is None:
                if self.lines:
                    self.eof_in_row = True
                raise StopIteration
            if not self.lines:
                stripped = line.strip()
                if not stripped or stripped.startswith("#"):
                    continue
            self.lines.append((self.src.line_no, line))
            self.chars += len(line)
            if self.chars > MAX_LINE_CHARS or len(self.lines) > MAX_CSV_ROW_LINES:
                raise _RowBroken("unterminated quoted field (row runs on too long)")
            return line

    @property
    def start(self) -> int:
        return self.lines[0][0] if self.lines else self.src.line_no

    @property
    def head(self) -> str:
        return "".join(line for _, line in self.lines[:2])[:SAMPLE_CHARS]

    def recover(self, stats: ReadStats, reason: str) -> None:
        """Count the broken row's first line as bad and replay the lines after it."""
        if self.long is not None:
            stats.add_bad(self.long.line_no, self.long.head, _TOO_LONG)
        if self.lines:
            no, first = self.lines[0]
            stats.add_bad(no, first, reason)
            self.src.unread(self.lines[1:])
        self.begin_row()


class _RowBroken(Exception):  # noqa: N818 - internal signal, never escapes this module
    pass


class _Columns:
    """Where the known columns are in a CSV header, and names for the extra ones."""

    def __init__(self, header: list[str], names: Mapping[str, str] | None = None) -> None:
        self.width = len(header)
        self.index: dict[str, int] = {}
        self.extra: list[tuple[int, str]] = []
        used: set[str] = set()
        source = _source_names(names)
        for i, raw in enumerate(header):
            name = raw.strip()
            key = source.get(name.lower(), name.lower())
            if key in _KNOWN_COLUMNS and key not in self.index:
                self.index[key] = i
                continue
            name = name or f"column_{i + 1}"
            unique, n = name, 2
            while unique in used or unique.lower() in self.index:
                unique, n = f"{name}_{n}", n + 1
            used.add(unique)
            self.extra.append((i, unique))

    def fall_back(self, header: list[str]) -> None:
        """A field mapped to a column the file lacks uses its own name's column (so a
        ``--url-column host`` setting still reads cascade's own ``url,label`` files)."""
        for i, raw in enumerate(header):
            key = raw.strip().lower()
            if key in _KNOWN_COLUMNS and key not in self.index:
                self.index[key] = i
                self.extra = [(j, n) for j, n in self.extra if j != i]

    def get(self, row: list[str], key: str) -> str | None:
        i = self.index.get(key)
        return row[i] if i is not None and i < len(row) else None


def _read_head(stream: Any) -> bytes:
    """Up to ``SNIFF_BYTES`` first bytes (replayed to the reader afterwards); a damaged
    ``.gz`` stops the look early, and the read itself then reports the damage."""
    read = getattr(stream, "read1", None) or stream.read
    head = b""
    with contextlib.suppress(EOFError, zlib.error, gzip.BadGzipFile):
        while len(head) < SNIFF_BYTES:
            chunk = read(SNIFF_BYTES - len(head))
            if not chunk:
                break
            head += chunk
    return head


def _text_encoding(head: bytes, name: str) -> str:
    """The encoding to read a byte stream with, from its first bytes: UTF-16 when it starts
    with a byte-order mark, else UTF-8. A stream that is not text raises
    ``InputFormatError`` instead of being read as lines of garbage: most of its first lines
    hold NUL bytes (binary, or UTF-16 without its mark), or more than a tenth of it is not
    UTF-8. A text file with a few bad bytes is read; a URL or label holding them is a bad
    line, counted."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "utf-16"  # the byte-order mark says which end first; the decoder drops it
    body = head[:-3] if len(head) == SNIFF_BYTES else head  # a cut multi-byte character
    lines = [line for line in body.split(b"\n") if line.strip()]
    with_nul = sum(b"\x00" in line for line in lines)
    decoded = body.decode("utf-8", errors="replace")
    invalid = decoded.count("\ufffd")
    if lines and with_nul > len(lines) / 2:
        what = f"NUL bytes in {with_nul} of its first {len(lines)} lines"
    elif invalid > max(8, len(decoded) // 10):
        what = f"{invalid} invalid UTF-8 sequences in its first {len(body)} bytes"
    else:
        return "utf-8-sig"
    raise InputFormatError(
        f"{name}: not a text file ({what}); give URLs as UTF-8 text, one per line, or CSV / "
        "JSON Lines (a UTF-16 file without a byte-order mark, or another encoding: convert "
        "it to UTF-8 first)")


class RecordReader(Iterator[InputRecord]):
    """An open input file, iterated lazily as ``InputRecord``s. Made by ``read_records``.

    Opening, format detection and the CSV header check happen at construction, so file-level
    problems raise ``InputFormatError`` before the first record. ``format``, ``name`` and
    ``stats`` describe the read. Also a context manager; closes itself at the end.
    """

    def __init__(
        self,
        source: InputSource,
        fmt: str | None = None,
        stats: ReadStats | None = None,
        columns: Mapping[str, str] | None = None,
        delimiter: str | None = None,
    ) -> None:
        self.stats = stats if stats is not None else ReadStats()
        bad = sorted(set(columns or {}) - set(_KNOWN_COLUMNS))
        if bad:
            raise ValueError(f"columns: unknown fields {bad}; known: {list(_KNOWN_COLUMNS)}")
        if delimiter is not None and len(delimiter) != 1:
            raise ValueError(f"delimiter must be one character, not {delimiter!r}")
        self._names = dict(columns) if columns else None
        self._delimiter = delimiter
        self._closers: list[Callable[[], None]] = []
        self._closed = False
        text, self.name = self._open(source)
        self._src = _Lines(text, self.stats)
        try:
            self.format = self._detect(fmt)
            self._columns: _Columns | None = None
            self._feed: _CsvFeed | None = None
            self._reader: Any = None
            if self.format in _DELIMITERS:
                self._read_header()
            self._gen = self._records()
        except BaseException:
            self.close()
            raise

    # -- opening --------------------------------------------------------------------------

    def _open(self, source: InputSource) -> tuple[Any, str]:
        if isinstance(source, bytes | bytearray):
            raise TypeError("read_records takes a path, a file object or an iterable of lines")
        if isinstance(source, str | os.PathLike):
            path = os.fspath(source)
            if path == "-":
                stdin = sys.stdin
                buffer = getattr(stdin, "buffer", None)
                if buffer is not None:
                    return self._wrap_binary(buffer, "<stdin>"), "<stdin>"
                return stdin, "<stdin>"
            try:
                raw = open(path, "rb", buffering=0)  # noqa: SIM115 - closed by close()
            except OSError as exc:
                reason = exc.strerror or str(exc)
                raise InputFormatError(f"cannot open input file {path!r}: {reason}") from exc
            self._closers.append(raw.close)
            return self._wrap_binary(raw, path), path
        if hasattr(source, "read"):
            name = getattr(source, "name", None)
            name = name if isinstance(name, str) else "<stream>"
            try:
                probe = source.read(0)  # type: ignore[union-attr]
            except (OSError, ValueError) as exc:
                raise InputFormatError(f"cannot read input {name}: {exc}") from exc
            if isinstance(probe, bytes):
                return self._wrap_binary(source, name), name
            return source, name
        if isinstance(source, Iterable):
            return _IterText(source), "<lines>"
        raise TypeError("read_records takes a path, a file object or an iterable of lines")

    def _wrap_binary(self, binary: Any, name: str) -> io.TextIOWrapper:
        read = getattr(binary, "read1", None) or binary.read
        prefix = b""
        try:
            while len(prefix) < 2:
                chunk = read(2 - len(prefix))
                if not chunk:
                    break
                prefix += chunk
            buffered: Any = io.BufferedReader(_Prefixed(binary, prefix), buffer_size=1 << 16)
            if prefix == GZIP_MAGIC:
                buffered = gzip.GzipFile(fileobj=buffered, mode="rb")
            head = _read_head(buffered)
            encoding = _text_encoding(head, name)
            buffered = io.BufferedReader(_Prefixed(buffered, head), buffer_size=1 << 16)
        except InputFormatError:
            self.close()
            raise
        except (OSError, ValueError) as exc:
            self.close()
            raise InputFormatError(f"cannot read input {name}: {exc}") from exc
        text = io.TextIOWrapper(buffered, encoding=encoding, errors="replace", newline="")
        # Closing the wrapper closes only our layers: _Prefixed never closes its source.
        self._closers.insert(0, text.close)
        return text

    def _detect(self, fmt: str | None) -> str:
        chosen = _normalise_format(fmt) if fmt is not None else _format_from_name(self.name)
        first = self._first_significant()
        url_name = str((self._names or {}).get("url", "url")).strip().lower()
        if not chosen:
            chosen, delimiter = ("txt", None)
            for name in dict.fromkeys((url_name, "url")):  # the mapped name, else its own
                if first is not None and chosen == "txt":
                    chosen, delimiter = _sniff(first, name, self._delimiter)
            self._delimiter = self._delimiter or delimiter
        elif chosen == "csv" and self._delimiter is None and first is not None:
            sniffed, delimiter = _sniff(first, url_name)  # a ';' or '|' header in a .csv
            if sniffed == "csv" and delimiter:
                self._delimiter = delimiter
        return chosen

    def _first_significant(self) -> str | None:
        """Skip leading blank and comment lines; leave the first real one to be read again."""
        while True:
            line = self._guarded(self._read_or_too_long)
            if line is None:
                return None
            if line is _SKIP:
                continue
            stripped = line.strip()
            if stripped and not stripped.startswith("#"):
                self._src.unread([(self._src.line_no, line)])
                return line

    def _read_or_too_long(self) -> Any:
        try:
            return self._src.readline()
        except _TooLong as exc:
            self.stats.add_bad(exc.line_no, exc.head, _TOO_LONG)
            return _SKIP

    def _read_header(self) -> None:
        delimiter = self._delimiter or _DELIMITERS[self.format]
        self._feed = _CsvFeed(self._src)
        self._reader = csv.reader(self._feed, delimiter=delimiter)
        header = self._guarded(self._next_row)
        if header is None:  # an empty file: no records, nothing wrong
            return
        columns = _Columns(header, self._names)
        columns.fall_back(header)
        if "url" not in columns.index:
            found = ", ".join(repr(h.strip()) for h in header[:20]) or "nothing"
            wanted = (self._names or {}).get("url", "url")
            hint = "name the URL column 'url', or say which it is (--url-column)"
            joined = "".join(header)
            for other in (";", "|", "\t", ","):
                if other != delimiter and other in joined:
                    hint = (f"the header holds {other!r}: if that separates the columns, "
                            f"give the delimiter (--delimiter {other!r})")
                    break
            raise InputFormatError(
                f"{self.name}: the {self.format.upper()} header has no {wanted!r} column"
                f" (found {found}); {hint}"
            )
        self._columns = columns

    # -- reading --------------------------------------------------------------------------

    def _next_row(self) -> list[str] | None:
        """The next well-formed CSV row, or None at the end; broken rows are counted."""
        feed, reader = self._feed, self._reader
        assert feed is not None
        while True:
            feed.begin_row()
            try:
                row = next(reader)
            except StopIteration:
                return None
            except _RowBroken as exc:
                feed.recover(self.stats, str(exc))
                continue
            except csv.Error as exc:
                feed.recover(self.stats, f"malformed {self.format.upper()} row: {exc}")
                continue
            if feed.eof_in_row:
                feed.recover(self.stats, "unterminated quoted field at end of file")
                continue
            return row

    def _records(self) -> Iterator[InputRecord]:
        if self.format in _DELIMITERS:
            yield from self._csv_records()
        else:
            yield from self._line_records(json_lines=self.format == "jsonl")

    def _line_records(self, json_lines: bool) -> Iterator[InputRecord]:
        src, stats = self._src, self.stats
        while True:
            line = self._read_or_too_long()
            if line is None:
                return
            if line is _SKIP:
                continue
            text = line.strip()
            if not text or text.startswith("#"):
                continue
            no = src.line_no
            result = _from_json(no, text, self._names) if json_lines \
                else _make_record(no, text)
            if isinstance(result, str):
                stats.add_bad(src.line_no, text, result)
            else:
                stats.records += 1
                yield result

    def _csv_records(self) -> Iterator[InputRecord]:
        columns, feed, stats = self._columns, self._feed, self.stats
        if columns is None or feed is None:
            return
        while True:
            row = self._next_row()
            if row is None:
                return
            line_no, text = feed.start, feed.head
            url = columns.get(row, "url") or ""
            if len(feed.lines) > 1 and ("\n" in url or "\r" in url):
                # A URL never holds a line break: a stray quote swallowed the next lines.
                feed.recover(stats, "unterminated quote: the url runs over several lines")
                continue
            if len(row) > columns.width and any(v.strip() for v in row[columns.width :]):
                stats.add_bad(
                    line_no, text, f"row has {len(row)} fields, the header has {columns.width}"
                )
                continue
            extra = {name: row[i] for i, name in columns.extra if i < len(row)}
            result = _make_record(
                line_no,
                columns.get(row, "url"),
                columns.get(row, "label"),
                columns.get(row, "count"),
                columns.get(row, "seen_at"),
                extra,
            )
            if isinstance(result, str):
                stats.add_bad(line_no, text, result)
            else:
                stats.records += 1
                yield result

    def _guarded(self, step: Callable[[], Any]) -> Any:
        """Run one read step. A file that cannot be read at all is an InputFormatError; one
        that breaks off after good lines (a truncated or corrupt ``.gz``) keeps what was
        read: the damage is counted as a bad line with the reason, and reading stops."""
        try:
            return step()
        except (OSError, EOFError, zlib.error, UnicodeError) as exc:
            self.close()
            read_so_far = self._src.physical if hasattr(self, "_src") else 0
            if read_so_far and self.stats.records:
                self.stats.add_bad(read_so_far + 1, "",
                                   f"file damaged after line {read_so_far}: {exc}; the "
                                   "lines before it were used")
                self.stats.damaged = True
                raise StopIteration from None
            raise InputFormatError(
                f"{self.name}: reading failed after line {read_so_far}: {exc}"
            ) from exc

    # -- iterator protocol ------------------------------------------------------------------

    def __iter__(self) -> RecordReader:
        return self

    def __next__(self) -> InputRecord:
        if self._closed:
            raise StopIteration
        try:
            return self._guarded(lambda: next(self._gen))
        except StopIteration:
            self.close()
            raise

    def close(self) -> None:
        """Release the file (a caller's own stream is left open)."""
        if self._closed:
            return
        self._closed = True
        for closer in self._closers:
            with contextlib.suppress(OSError, ValueError):
                closer()

    def __enter__(self) -> RecordReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


_SKIP: Any = object()


def _source_names(names: Mapping[str, str] | None) -> dict[str, str]:
    """``{"url": "host"}`` (known field -> the file's name for it) as file name -> field,
    lower-cased; a known name that is mapped away no longer means itself."""
    if not names:
        return {}
    out = {str(v).strip().lower(): k for k, v in names.items()}
    for k in names:
        out.setdefault(k, f"\x00{k}")  # e.g. a 'url' column when --url-column says 'host'
    return out


def _from_json(line_no: int, text: str,
               names: Mapping[str, str] | None = None) -> InputRecord | str:
    """One JSON Lines line: an object with a ``url``, or a bare JSON string."""
    try:
        value = json.loads(text)
    except RecursionError:
        return "invalid JSON: nested too deeply"
    except ValueError as exc:
        return f"invalid JSON: {exc}"
    if isinstance(value, str):
        return _make_record(line_no, value)
    if not isinstance(value, dict):
        return f"a JSON line must be an object or a string, not {type(value).__name__}"
    source = _source_names(names)
    fields: dict[str, Any] = {}
    extra: dict[str, str] = {}
    for k, v in value.items():
        field = source.get(str(k).lower(), str(k)) if source else str(k)
        if field in _KNOWN_COLUMNS and field not in fields:
            fields[field] = v
        else:
            extra[str(k)] = v if isinstance(v, str) else json.dumps(v, ensure_ascii=False)
    if "url" not in fields:
        return f"JSON object has no {(names or {}).get('url', 'url')!r}"
    return _make_record(line_no, fields["url"], fields.get("label"), fields.get("count"),
                        fields.get("seen_at"), extra)


def read_records(
    path_or_file: InputSource,
    fmt: str | None = None,
    stats: ReadStats | None = None,
    columns: Mapping[str, str] | None = None,
    delimiter: str | None = None,
) -> RecordReader:
    """Stream the records of a URL list; bad lines are counted in ``stats`` and skipped.

    ``path_or_file`` is a path (``-`` for stdin), a text or binary file object, or an
    iterable of lines. Gzip is detected by its magic bytes. ``fmt`` ("txt", "csv", "tsv",
    "jsonl") overrides detection by suffix and by the first line. Raises ``InputFormatError``
    when the file cannot be opened or read, or a CSV/TSV header has no ``url`` column.
    ``columns`` names the file's own columns (or JSON keys) for the known fields, e.g.
    ``{"url": "host", "label": "category"}``; ``delimiter`` overrides the CSV/TSV one
    (it applies only to a CSV/TSV input: a ``.txt`` or ``.jsonl`` file is read as such).
    """
    return RecordReader(path_or_file, fmt=fmt, stats=stats, columns=columns,
                        delimiter=delimiter)


# --------------------------------------------------------------------------- writers


def _json_default(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return dataclasses.asdict(value)
    if isinstance(value, set | frozenset):
        try:
            return sorted(value)
        except TypeError:
            return list(value)
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return value.tolist()
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    raise TypeError(f"cannot write a {type(value).__name__} value as JSON")


def _finite(value: Any, depth: int = 0) -> Any:
    """The value with NaN and infinities replaced by None, so the output stays valid JSON."""
    if depth > 64:
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {k: _finite(v, depth + 1) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v, depth + 1) for v in value]
    if isinstance(value, str | int | bool) or value is None:
        return value
    try:
        return _finite(_json_default(value), depth + 1)
    except TypeError:
        return value


def _dumps(value: Any) -> str:
    options: dict[str, Any] = {
        "ensure_ascii": False,
        "separators": (",", ":"),
        "allow_nan": False,
        "default": _json_default,
    }
    try:
        return json.dumps(value, **options)
    except ValueError:
        return json.dumps(_finite(value), **options)


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return str(value)
    return _dumps(value)


class RecordWriter:
    """Writes result dicts as JSON Lines (default) or CSV/TSV. Made by ``open_writer``.

    On a path the data goes to ``<path>.tmp`` and is renamed into place on a clean close,
    so a crash or an exception inside ``with`` never leaves a partial file under the final
    name. ``-`` writes to stdout; a caller's file object is flushed but left open.
    """

    def __init__(
        self,
        path_or_file: str | os.PathLike[str] | IO[str] | IO[bytes],
        fmt: str | None = None,
        *,
        compress: bool | None = None,
        fieldnames: Iterable[str] | None = None,
    ) -> None:
        self.count = 0
        self._closed = False
        self._final: str | None = None  # set when we own the file
        self._tmp: str | None = None
        self._wrapper: io.TextIOWrapper | None = None
        self._gz: gzip.GzipFile | None = None
        self._fields: list[str] | None = list(fieldnames) if fieldnames is not None else None
        self._field_set = set(self._fields or ())
        self._csv: Any = None
        self.name = self._name_of(path_or_file)
        chosen = fmt if fmt is not None else (_format_from_name(self.name) or "jsonl")
        chosen = chosen.strip().lower().lstrip(".").removesuffix(".gz")
        chosen = {"ndjson": "jsonl", "json": "jsonl"}.get(chosen, chosen)
        if chosen not in ("jsonl", "csv", "tsv"):
            raise ValueError(f"unknown output format {fmt!r}; use jsonl, csv or tsv")
        self.format = chosen
        self._out: Any = self._open(path_or_file, compress)

    @staticmethod
    def _name_of(target: Any) -> str:
        if isinstance(target, str | os.PathLike):
            path = os.fspath(target)
            return "<stdout>" if path == "-" else path
        name = getattr(target, "name", None)
        return name if isinstance(name, str) else "<stream>"

    def _open(self, target: Any, compress: bool | None) -> Any:
        """Set up the layers: sink (file or caller's stream), optional gzip, text wrapper."""
        if isinstance(target, str | os.PathLike) and os.fspath(target) != "-":
            path = os.fspath(target)
            compress = path.lower().endswith(".gz") if compress is None else compress
            direct = os.path.exists(path) and not os.path.isfile(path)  # /dev/stdout, a FIFO
            self._final = path
            self._tmp = None if direct else f"{path}.tmp"
            try:
                sink: Any = open(self._tmp or path, "wb")  # noqa: SIM115 - closed in close()
            except OSError as exc:
                raise OSError(exc.errno, f"cannot write output file: {exc.strerror}", path) from exc
        else:
            stream = sys.stdout if isinstance(target, str | os.PathLike) else target
            if stream is sys.stdout and getattr(stream, "buffer", None) is not None:
                stream.flush()
                stream = stream.buffer
            mode = getattr(stream, "mode", "")
            binary = isinstance(stream, io.RawIOBase | io.BufferedIOBase) or (
                isinstance(mode, str) and "b" in mode
            )
            if not binary:
                if compress:
                    raise ValueError("compress=True needs a binary stream or a path")
                self._sink = stream
                return stream
            sink = stream
        self._sink = sink
        layer: Any = sink
        if compress:
            self._gz = gzip.GzipFile(
                filename=os.path.basename(self._final or ""), mode="wb", fileobj=sink
            )
            layer = self._gz
        self._wrapper = io.TextIOWrapper(
            layer, encoding="utf-8", errors="backslashreplace", newline=""
        )
        return self._wrapper

    def write(self, record: Mapping[str, Any]) -> None:
        """Write one record (a mapping, or a dataclass instance such as ``InputRecord``)."""
        if self._closed:
            raise ValueError(f"write to a closed writer for {self.name}")
        if dataclasses.is_dataclass(record) and not isinstance(record, type):
            record = dataclasses.asdict(record)
        if not isinstance(record, Mapping):
            raise TypeError(f"a record must be a mapping, not {type(record).__name__}")
        if self.format == "jsonl":
            self._out.write(_dumps(record) + "\n")
        else:
            if self._csv is None:
                if self._fields is None:
                    self._fields = [str(k) for k in record]
                    self._field_set = set(self._fields)
                delimiter = _DELIMITERS[self.format]
                self._csv = csv.writer(self._out, delimiter=delimiter, lineterminator="\n")
                self._csv.writerow(self._fields)
            unknown = [k for k in record if k not in self._field_set]
            if unknown:
                raise ValueError(
                    f"record has keys {unknown!r} that are not in the {self.format.upper()}"
                    f" header {self._fields!r} (the header comes from the first record)"
                )
            self._csv.writerow([_cell(record.get(k)) for k in self._fields or ()])
        self.count += 1

    def _flush_layers(self) -> None:
        if self._wrapper is not None:
            self._wrapper.flush()
            self._wrapper.detach()  # leaves the layer below open
            self._wrapper = None
        if self._gz is not None:
            self._gz.close()  # writes the gzip trailer; never closes the sink
            self._gz = None
        self._sink.flush()

    def close(self) -> None:
        """Flush everything; on a path, sync and move the file to its final name."""
        if self._closed:
            return
        self._closed = True
        try:
            self._flush_layers()
            if self._final is not None:
                try:
                    os.fsync(self._sink.fileno())
                except OSError as exc:
                    if exc.errno not in (errno.EINVAL, errno.ENOTSUP):
                        raise
                self._sink.close()
                if self._tmp is not None:
                    os.replace(self._tmp, self._final)
        except BaseException:
            self._discard()
            raise

    def abort(self) -> None:
        """Stop writing. On a path the temporary file is deleted and the final name left alone;
        on a caller's stream what was written is kept (flushed)."""
        if self._closed:
            return
        self._closed = True
        if self._final is None:
            with contextlib.suppress(OSError, ValueError):
                self._flush_layers()
            return
        self._discard()

    def _discard(self) -> None:
        if self._final is None:
            return
        for step in (self._flush_layers, self._sink.close):
            with contextlib.suppress(Exception):
                step()
        if self._tmp is not None:
            with contextlib.suppress(OSError):
                os.unlink(self._tmp)

    def keep_partial(self) -> str | None:
        """Stop writing, keeping what was written: on a path, the rows so far are moved to
        ``<name>.partial`` (never to the final name, which would look complete; if that
        exists, from an earlier stop, ``<name>.partial-2`` and so on) and that name is
        returned; None when nothing was written or the target is a stream."""
        if self._closed:
            return None
        if self._final is None or self._tmp is None or not self.count:
            self.abort()
            return None
        self._closed = True
        try:
            self._flush_layers()
            self._sink.close()
            partial = f"{self._final}.partial"
            n = 2
            while os.path.exists(partial):  # never replace the rows of an earlier stop
                partial, n = f"{self._final}.partial-{n}", n + 1
            os.replace(self._tmp, partial)
        except BaseException:
            self._discard()
            raise
        return partial

    def __enter__(self) -> RecordWriter:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 *rest: object) -> None:
        if exc_type is None:
            self.close()
        elif isinstance(exc, KeyboardInterrupt):  # Ctrl-C, or SIGTERM in the CLI
            partial = self.keep_partial()
            if partial is not None:  # the CLI names it and says how to go on
                kept = list(getattr(exc, "partial_outputs", []))
                kept.append((partial, self.count))
                exc.partial_outputs = kept  # type: ignore[attr-defined]
        else:
            self.abort()


def open_writer(
    path_or_file: str | os.PathLike[str] | IO[str] | IO[bytes],
    fmt: str | None = None,
    *,
    compress: bool | None = None,
    fieldnames: Iterable[str] | None = None,
) -> RecordWriter:
    """Open a result writer: ``jsonl`` (default) or ``csv``/``tsv``, by ``fmt`` or suffix.

    A ``.gz`` path is gzipped (``compress`` overrides). ``-`` is stdout. For CSV the header is
    ``fieldnames`` or the first record's keys.
    """
    return RecordWriter(path_or_file, fmt, compress=compress, fieldnames=fieldnames)


# --------------------------------------------------------------------------- progress


def _isatty(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, OSError, ValueError):
        return False


class Progress:
    """Progress on stderr: a tqdm bar on a terminal, plain periodic lines elsewhere.

    On a terminal the bar (count, percentage when ``total`` is known, rate, time left) comes
    from tqdm, redrawn at most once per ``every_s`` seconds. Off a terminal, when asked for
    with ``enabled=True``, each report is its own plain line (``scoring: 12,345 2,100.0/s``)
    so a log file stays readable; ``clock`` times those lines. ``enabled`` defaults to
    whether the stream is a terminal; ``enabled=False`` prints nothing. Never raises on a
    broken stream: progress is a courtesy, not part of the result.
    """

    def __init__(
        self,
        total: int | None = None,
        label: str = "scoring",
        every_s: float = 1.0,
        stream: TextIO | None = None,
        enabled: bool | None = None,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if total is not None and total < 0:
            raise ValueError("total must be a non-negative count or None")
        if not every_s >= 0:
            raise ValueError("every_s must be a non-negative number of seconds")
        self.total = total
        self.label = label
        self.every_s = every_s
        self.stream = stream if stream is not None else sys.stderr
        self._tty = _isatty(self.stream)
        self.enabled = self._tty if enabled is None else enabled
        self.count = 0
        self._clock = clock
        self._start = clock()
        self._last = self._start
        self._closed = False
        self._bar: tqdm | None = None
        if self.enabled and self._tty:
            try:
                self._bar = tqdm(
                    total=total, desc=label, file=self.stream, mininterval=every_s,
                    dynamic_ncols=True, leave=True,
                )
            except (OSError, ValueError):
                self.enabled = False

    def update(self, n: int = 1) -> None:
        """Add ``n`` done items; report if ``every_s`` has passed since the last report."""
        self.count += n
        if not self.enabled or self._closed:
            return
        if self._bar is not None:
            self._guarded(self._bar.update, n)
            return
        now = self._clock()
        if now - self._last >= self.every_s:
            self._last = now
            self._guarded(self._write_line, self._line(now, final=False))

    def close(self) -> None:
        """Finish: the bar's last state, or a final line (total, elapsed, mean rate). Idempotent."""
        if self._closed:
            return
        self._closed = True
        if not self.enabled:
            return
        if self._bar is not None:
            self._guarded(self._bar.close)
        else:
            self._guarded(self._write_line, self._line(self._clock(), final=True))

    def _line(self, now: float, final: bool) -> str:
        """One plain report line; durations in tqdm's format so both modes read alike."""
        elapsed = max(now - self._start, 0.0)
        rate = self.count / elapsed if elapsed > 0 else 0.0
        parts = [f"{self.label}: {self.count:,}"
                 + (f"/{self.total:,}" if self.total is not None else "")]
        if self.total:
            parts.append(f"{100.0 * self.count / self.total:.1f}%")
        parts.append(f"{rate:,.1f}/s")
        if final:
            parts.append(f"in {tqdm.format_interval(round(elapsed))}")
        elif self.total and rate > 0 and self.count < self.total:
            parts.append(f"eta {tqdm.format_interval(round((self.total - self.count) / rate))}")
        return " ".join(parts)

    def _write_line(self, text: str) -> None:
        self.stream.write(text + "\n")
        self.stream.flush()

    def _guarded(self, call: Callable[..., object], *args: Any) -> None:
        """Run one write; on a broken stream go quiet for good instead of raising."""
        try:
            call(*args)
        except (OSError, ValueError):
            self.enabled = False
            if self._bar is not None:
                self._bar.disable = True  # so tqdm's own close/__del__ writes nothing more

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
