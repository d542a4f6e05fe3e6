"""Input readers, result writers and the progress line: formats, gzip, bad lines, streaming."""

from __future__ import annotations

import csv
import gzip
import io
import json
import os
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cascade.errors import InputFormatError
from cascade.io import (
    MAX_LINE_CHARS,
    BadLine,
    InputRecord,
    Progress,
    ReadStats,
    open_writer,
    read_records,
)

URLS = ["http://a.example/x", "https://b.example/", "http://c.example/p?q=1"]


def _write(path: Path, text: str, gz: bool = False) -> Path:
    data = text.encode("utf-8")
    path.write_bytes(gzip.compress(data) if gz else data)
    return path


def _urls(source: object, **kw: object) -> list[str]:
    return [r.url for r in read_records(source, **kw)]  # type: ignore[arg-type]


# --------------------------------------------------------------------------- formats


@pytest.mark.parametrize("gz", [False, True])
def test_plain_text(tmp_path: Path, gz: bool) -> None:
    text = "# a comment\n\n" + "\n".join(URLS) + "\n  \n"
    path = _write(tmp_path / ("urls.txt" + (".gz" if gz else "")), text, gz)
    stats = ReadStats()
    records = list(read_records(path, stats=stats))
    assert [r.url for r in records] == URLS
    assert [r.line_no for r in records] == [3, 4, 5]
    assert all(r.count == 1 and r.label is None for r in records)
    assert (stats.lines, stats.records, stats.bad) == (6, 3, 0)


@pytest.mark.parametrize("gz", [False, True])
@pytest.mark.parametrize("suffix, delim", [(".csv", ","), (".tsv", "\t")])
def test_csv_and_tsv(tmp_path: Path, gz: bool, suffix: str, delim: str) -> None:
    rows = [
        ["URL", "label", "count", "seen_at", "source"],
        [URLS[0], "news", "3", "2024-01-02", "feed"],
        [URLS[1], "", "2.0", "", "crawl"],
        [URLS[2], "shop", "", "", ""],
    ]
    text = "".join(delim.join(r) + "\n" for r in rows)
    path = _write(tmp_path / ("in" + suffix + (".gz" if gz else "")), text, gz)
    reader = read_records(path)
    assert reader.format == suffix[1:]
    records = list(reader)
    assert records[0] == InputRecord(2, URLS[0], "news", 3, "2024-01-02T00:00:00Z",
                                     {"source": "feed"})
    assert records[1] == InputRecord(3, URLS[1], None, 2, None, {"source": "crawl"})
    assert records[2].count == 1 and records[2].label == "shop"


@pytest.mark.parametrize("gz", [False, True])
@pytest.mark.parametrize("suffix", [".jsonl", ".ndjson"])
def test_jsonl(tmp_path: Path, gz: bool, suffix: str) -> None:
    lines = [
        json.dumps({"url": URLS[0], "label": "news", "count": 4, "seen_at": "2024-01-01"}),
        json.dumps(URLS[1]),
        json.dumps({"url": URLS[2], "count": 5.0, "site": "c", "tags": ["x", "ü"]}),
    ]
    path = _write(tmp_path / ("in" + suffix + (".gz" if gz else "")), "\n".join(lines), gz)
    records = list(read_records(path))
    assert records[0] == InputRecord(1, URLS[0], "news", 4, "2024-01-01T00:00:00Z", {})
    assert records[1] == InputRecord(2, URLS[1])
    assert records[2].count == 5
    assert records[2].extra == {"site": "c", "tags": '["x", "ü"]'}


def test_gzip_detected_by_magic_not_suffix(tmp_path: Path) -> None:
    path = _write(tmp_path / "urls.txt", "\n".join(URLS), gz=True)  # gzipped, no .gz
    assert _urls(path) == URLS
    plain = _write(tmp_path / "plain.txt.gz", "\n".join(URLS))  # .gz but not gzipped
    assert _urls(plain) == URLS


@pytest.mark.parametrize(
    "first, expected",
    [
        ('{"url": "http://a.example/"}', "jsonl"),
        ('"http://a.example/"', "jsonl"),
        ("url,label", "csv"),
        ('"url","label"', "csv"),
        ("label\tURL", "tsv"),
        ("url", "csv"),
        ("http://a.example/", "txt"),
        ("http://a.example/url,x", "txt"),
        ("http://a.example/?a=1,url", "txt"),
    ],
)
def test_sniffing(tmp_path: Path, first: str, expected: str) -> None:
    path = _write(tmp_path / "input", "\n# comment\n" + first + "\n")
    assert read_records(path).format == expected


def test_explicit_format_overrides(tmp_path: Path) -> None:
    path = _write(tmp_path / "in.csv", "url,label\nhttp://a.example/,x\n")
    assert _urls(path, fmt="txt") == ["url,label", "http://a.example/,x"]
    with pytest.raises(InputFormatError, match="unknown input format"):
        read_records(path, fmt="xml")


def test_sniffed_stream_formats() -> None:
    jsonl = io.StringIO('{"url": "http://a.example/"}\n"http://b.example/"\n')
    assert _urls(jsonl) == ["http://a.example/", "http://b.example/"]
    tsv = io.BytesIO(b"url\tlabel\nhttp://a.example/\tx\n")
    assert [(r.url, r.label) for r in read_records(tsv)] == [("http://a.example/", "x")]


# --------------------------------------------------------------------------- streams, BOM, stdin


def test_text_and_binary_streams() -> None:
    text = "\n".join(URLS) + "\n"
    assert _urls(io.StringIO(text)) == URLS
    assert _urls(io.BytesIO(text.encode())) == URLS
    assert _urls(io.BytesIO(gzip.compress(text.encode()))) == URLS
    assert _urls(iter(URLS)) == URLS  # any iterable of lines


def test_caller_stream_left_open() -> None:
    buf = io.BytesIO(b"http://a.example/\n")
    assert _urls(buf) == ["http://a.example/"]
    assert not buf.closed


def test_stdin_dash(monkeypatch: pytest.MonkeyPatch) -> None:
    raw = io.BytesIO(gzip.compress("\n".join(URLS).encode()))
    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(raw))
    reader = read_records("-")
    assert reader.name == "<stdin>"
    assert [r.url for r in reader] == URLS


@pytest.mark.parametrize("kind", ["bytes", "gzip", "text"])
def test_bom_is_stripped(kind: str) -> None:
    body = "url,label\nhttp://a.example/,x\n"
    if kind == "text":
        source: object = io.StringIO("\ufeff" + body)
    else:
        data = ("\ufeff" + body).encode()
        source = io.BytesIO(gzip.compress(data) if kind == "gzip" else data)
    reader = read_records(source)  # type: ignore[arg-type]
    assert reader.format == "csv"
    assert [r.url for r in reader] == ["http://a.example/"]


@pytest.mark.parametrize("bom", ["utf-16-le", "utf-16-be"])
def test_utf16_with_a_byte_order_mark_is_read_as_text(bom: str) -> None:
    # Unicode 15, section 23.8: U+FEFF first says which byte order a UTF-16 file uses
    text = "url,label\nhttp://\u00fc.example/,x\nhttp://b.example/,y\n"
    data = "\ufeff".encode(bom) + text.encode(bom)
    for source in (data, gzip.compress(data)):
        assert _urls(io.BytesIO(source)) == ["http://\u00fc.example/", "http://b.example/"]


@pytest.mark.parametrize("data", [
    bytes(range(256)) * 8,  # binary: NUL bytes
    "http://a.example/\n".encode("utf-16-le"),  # UTF-16 without its byte-order mark
    bytes(range(0x80, 0x100)) * 8 + b"\n",  # no NUL, but not UTF-8 at all
], ids=["binary", "utf16-no-bom", "latin-noise"])
def test_a_file_that_is_not_text_is_one_clear_error(tmp_path: Path, data: bytes) -> None:
    path = tmp_path / "urls.txt"
    path.write_bytes(data)
    with pytest.raises(InputFormatError, match="not (a text file|UTF-8 text)"):
        list(read_records(path))
    path.write_bytes(gzip.compress(data))
    with pytest.raises(InputFormatError, match="not (a text file|UTF-8 text)"):
        list(read_records(path))


def test_crlf_and_missing_final_newline() -> None:
    assert _urls(io.BytesIO(b"http://a.example/\r\nhttp://b.example/")) == [
        "http://a.example/",
        "http://b.example/",
    ]


# --------------------------------------------------------------------------- bad lines


def test_bad_jsonl_lines_counted_and_skipped() -> None:
    lines = [
        '{"url": "http://a.example/"}',
        "{not json",
        '{"label": "x"}',
        "[1, 2]",
        '{"url": "http://b.example/", "count": -2}',
        '{"url": "http://c.example/", "count": 1.5}',
        '{"url": "http://d.example/", "count": "many"}',
        '{"url": 7}',
        "x" * (MAX_LINE_CHARS + 10),
        '{"url": "http://e.example/", "count": "3.0"}',
    ]
    stats = ReadStats()
    records = list(read_records(io.StringIO("\n".join(lines)), fmt="jsonl", stats=stats))
    assert [(r.url, r.count) for r in records] == [
        ("http://a.example/", 1),
        ("http://e.example/", 3),
    ]
    assert (stats.lines, stats.records, stats.bad) == (10, 2, 8)
    assert [s.line_no for s in stats.samples] == [2, 3, 4, 5, 6, 7, 8, 9]
    reasons = [s.reason for s in stats.samples]
    assert "invalid JSON" in reasons[0]
    assert "no 'url'" in reasons[1]
    assert "negative" in reasons[3]
    assert "whole number" in reasons[4]
    assert "longer than" in reasons[7]
    assert all(len(s.text) <= 200 for s in stats.samples)
    assert isinstance(stats.samples[0], BadLine)


def test_bad_csv_rows_and_samples_capped() -> None:
    rows = ["url,count"] + [f"http://h{i}.example/,{-i - 1}" for i in range(25)]
    rows += ["http://ok.example/,2", ",5", "http://x.example/,1,surplus"]
    stats = ReadStats()
    records = list(read_records(io.StringIO("\n".join(rows)), stats=stats))
    assert [(r.url, r.count) for r in records] == [("http://ok.example/", 2)]
    assert stats.bad == 27
    assert len(stats.samples) == 10
    out = stats.to_dict()
    assert out["bad"] == 27 and len(out["samples"]) == 10
    assert json.loads(json.dumps(out)) == out


def test_unterminated_quote_costs_one_line() -> None:
    text = 'url,note\n"http://a.example/\nhttp://b.example/,x\nhttp://c.example/,"two\nlines"\n'
    stats = ReadStats()
    records = list(read_records(io.StringIO(text), stats=stats))
    assert [r.url for r in records] == ["http://b.example/", "http://c.example/"]
    assert records[1].extra == {"note": "two\nlines"}
    assert stats.bad == 1 and stats.samples[0].line_no == 2


def test_undecodable_bytes_only_matter_in_the_url() -> None:
    data = b"url,note\nhttp://a.example/\xff,x\nhttp://b.example/,caf\xe9\n"
    stats = ReadStats()
    records = list(read_records(io.BytesIO(data), stats=stats))
    assert [r.url for r in records] == ["http://b.example/"]
    assert records[0].extra["note"] == "caf\ufffd"
    assert stats.bad == 1 and "UTF-8" in stats.samples[0].reason


def test_very_long_line_is_skipped_without_losing_the_next() -> None:
    data = b"http://a.example/\n" + b"y" * (3 * MAX_LINE_CHARS) + b"\r\nhttp://b.example/\n"
    stats = ReadStats()
    assert _urls(io.BytesIO(data), stats=stats) == ["http://a.example/", "http://b.example/"]
    assert stats.bad == 1 and stats.samples[0].line_no == 2 and stats.lines == 3


# --------------------------------------------------------------------------- file-level errors


def test_csv_without_url_column_names_the_file(tmp_path: Path) -> None:
    path = _write(tmp_path / "hosts.csv", "host,label\na.example,x\n")
    with pytest.raises(InputFormatError, match=r"hosts\.csv.*'url'"):
        read_records(path)


def test_missing_file_raises(tmp_path: Path) -> None:
    missing = tmp_path / "nope.txt"
    with pytest.raises(InputFormatError, match="nope.txt"):
        read_records(missing)
    with pytest.raises(InputFormatError, match="cannot open"):
        read_records(tmp_path)  # a directory


def test_truncated_gzip_keeps_the_good_records_and_counts_the_damage(tmp_path: Path) -> None:
    body = "".join(f"http://h{i}.example/\n" for i in range(20000)).encode()
    path = tmp_path / "cut.txt.gz"
    path.write_bytes(gzip.compress(body)[:-40])
    stats = ReadStats()
    got = [record.url for record in read_records(path, stats=stats)]
    assert len(got) > 1000  # what was readable was delivered, and nothing after the damage
    assert stats.damaged and stats.bad == 1 and "damaged" in stats.samples[-1].reason


def test_a_gzip_broken_before_any_line_is_an_input_error(tmp_path: Path) -> None:
    path = tmp_path / "broken.txt.gz"
    path.write_bytes(gzip.compress(b"http://a.example/\n" * 10)[:12])
    with pytest.raises(InputFormatError, match=r"broken\.txt\.gz"):
        list(read_records(path))


def test_empty_inputs() -> None:
    assert _urls(io.BytesIO(b"")) == []
    assert _urls(io.StringIO(""), fmt="csv") == []
    assert _urls(io.BytesIO(b"\n\n# only comments\n")) == []


# --------------------------------------------------------------------------- streaming


class _CountingStream(io.RawIOBase):
    """A binary stream of ``n`` URL lines, made on demand; counts the bytes handed out."""

    def __init__(self, n: int) -> None:
        self._lines = (f"http://h{i}.example/path\n".encode() for i in range(n))
        self._pending = b""
        self.served = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: memoryview) -> int:  # type: ignore[override]
        while len(self._pending) < len(buffer):
            line = next(self._lines, None)
            if line is None:
                break
            self._pending += line
        n = min(len(buffer), len(self._pending))
        buffer[:n] = self._pending[:n]
        self._pending = self._pending[n:]
        self.served += n
        return n


def test_reading_is_lazy_on_a_huge_stream() -> None:
    stream = _CountingStream(1_000_000)  # ~30 MB if materialised
    reader = read_records(stream)
    first = [next(reader) for _ in range(5)]
    assert [r.line_no for r in first] == [1, 2, 3, 4, 5]
    assert stream.served < 512 * 1024


def test_reading_is_lazy_on_a_generator_of_lines() -> None:
    pulled = 0

    def lines():
        nonlocal pulled
        for i in range(1_000_000):
            pulled += 1
            yield f"http://h{i}.example/"

    reader = read_records(lines())
    assert next(reader).url == "http://h0.example/"
    assert next(reader).url == "http://h1.example/"
    assert pulled < 10


# --------------------------------------------------------------------------- writers


RESULTS = [
    {"url": URLS[0], "label": "news", "score": 0.5, "meta": {"k": [1, 2]}, "ok": True},
    {"url": URLS[1], "label": "ünïcode", "score": None, "meta": {}, "ok": False},
]


@pytest.mark.parametrize("name", ["out.jsonl", "out.jsonl.gz"])
def test_jsonl_writer_round_trip(tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    with open_writer(path) as w:
        for r in RESULTS:
            w.write(r)
    assert w.count == 2 and not Path(f"{path}.tmp").exists()
    raw = path.read_bytes()
    assert (raw[:2] == b"\x1f\x8b") == name.endswith(".gz")
    text = (gzip.decompress(raw) if name.endswith(".gz") else raw).decode()
    assert [json.loads(line) for line in text.splitlines()] == RESULTS
    assert "ünïcode" in text and '", "' not in text  # ensure_ascii=False, compact
    assert [(r.url, r.label) for r in read_records(path)] == [
        (URLS[0], "news"),
        (URLS[1], "ünïcode"),
    ]


@pytest.mark.parametrize("name", ["out.csv", "out.csv.gz"])
def test_csv_writer_round_trip(tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    with open_writer(path) as w:
        for r in RESULTS:
            w.write(r)
        w.write({"url": URLS[2]})  # missing keys are empty cells
    opener = gzip.open if name.endswith(".gz") else open
    with opener(path, "rt", encoding="utf-8", newline="") as f:
        rows = list(csv.reader(f))
    assert rows[0] == ["url", "label", "score", "meta", "ok"]
    assert rows[1] == [URLS[0], "news", "0.5", '{"k":[1,2]}', "true"]
    assert rows[3] == [URLS[2], "", "", "", ""]
    records = list(read_records(path))
    assert [r.url for r in records] == URLS
    assert records[0].extra == {"score": "0.5", "meta": '{"k":[1,2]}', "ok": "true"}


def test_csv_writer_refuses_keys_outside_the_header(tmp_path: Path) -> None:
    with open_writer(tmp_path / "o.csv") as w:
        w.write({"url": "u"})
        with pytest.raises(ValueError, match="not in the CSV header"):
            w.write({"url": "v", "new": 1})


def test_writer_accepts_input_records_and_odd_values(tmp_path: Path) -> None:
    path = tmp_path / "o.jsonl"
    with open_writer(path) as w:
        w.write(InputRecord(3, "http://a.example/", extra={"k": "v"}))  # type: ignore[arg-type]
        w.write({"url": "u", "score": float("nan"), "tags": {"b", "a"}, "p": Path("x")})
    lines = [json.loads(line) for line in path.read_text().splitlines()]
    assert lines[0]["line_no"] == 3 and lines[0]["extra"] == {"k": "v"}
    assert lines[1] == {"url": "u", "score": None, "tags": ["a", "b"], "p": "x"}


def test_atomic_write_leaves_nothing_on_error(tmp_path: Path) -> None:
    path = tmp_path / "out.jsonl"
    with pytest.raises(RuntimeError), open_writer(path) as w:
        w.write({"url": "u"})
        raise RuntimeError("crash mid-batch")
    assert not path.exists()
    assert os.listdir(tmp_path) == []


def test_atomic_write_keeps_old_file_until_done(tmp_path: Path) -> None:
    path = tmp_path / "out.jsonl"
    path.write_text("old\n")
    w = open_writer(path)
    w.write({"url": "new"})
    assert path.read_text() == "old\n"
    w.close()
    assert json.loads(path.read_text()) == {"url": "new"}
    with pytest.raises(ValueError, match="closed"):
        w.write({"url": "again"})


def test_writer_to_streams(capsys: pytest.CaptureFixture[str]) -> None:
    text = io.StringIO()
    with open_writer(text, fmt="csv") as w:
        w.write({"url": "u", "n": 1})
    assert text.getvalue() == "url,n\nu,1\n" and not text.closed

    binary = io.BytesIO()
    with open_writer(binary, compress=True) as w:
        w.write({"url": "ü"})
    assert json.loads(gzip.decompress(binary.getvalue())) == {"url": "ü"}
    assert not binary.closed

    with open_writer("-") as w:
        w.write({"url": "stdout"})
    assert json.loads(capsys.readouterr().out) == {"url": "stdout"}


def test_writer_unknown_format(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="unknown output format"):
        open_writer(tmp_path / "o.xml", fmt="xml")
    assert os.listdir(tmp_path) == []


# --------------------------------------------------------------------------- progress


class _Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_progress_rate_limited_and_final_line() -> None:
    out, clock = io.StringIO(), _Clock()
    p = Progress(total=1000, label="scoring", every_s=1.0, stream=out, enabled=True, clock=clock)
    for _ in range(10):
        clock.now += 0.05
        p.update(10)
    assert out.getvalue() == ""  # under a second: nothing yet
    clock.now += 1.0
    p.update(100)
    p.update(100)  # same instant: no second line
    lines = out.getvalue().splitlines()
    assert len(lines) == 1
    assert (
        lines[0].startswith("scoring: 200/1,000 20.0%") and "/s" in lines[0] and "eta" in lines[0]
    )
    assert "\r" not in out.getvalue() and "\x1b" not in out.getvalue()  # plain lines off a tty
    clock.now += 0.5
    p.close()
    p.close()
    final = out.getvalue().splitlines()
    assert len(final) == 2 and final[1] == "scoring: 300/1,000 30.0% 150.0/s in 00:02"


def test_progress_plain_lines_repeat_without_a_total() -> None:
    out, clock = io.StringIO(), _Clock()
    p = Progress(label="reading", every_s=5.0, stream=out, enabled=True, clock=clock)
    for _ in range(3):
        clock.now += 5.0
        p.update(1000)
    p.close()
    lines = out.getvalue().splitlines()
    assert lines == [
        "reading: 1,000 200.0/s",
        "reading: 2,000 200.0/s",
        "reading: 3,000 200.0/s",
        "reading: 3,000 200.0/s in 00:15",
    ]


def test_progress_disabled_off_a_terminal() -> None:
    out = io.StringIO()  # not a tty: disabled by default
    p = Progress(stream=out, every_s=0.0)
    p.update(5)
    p.close()
    assert out.getvalue() == "" and p.count == 5


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_on_a_terminal_draws_a_bar_and_ends_the_line() -> None:
    out = _Terminal()
    with Progress(total=1000, label="scoring", stream=out) as p:  # a tty: enabled by default
        for _ in range(3):
            p.update(100)
    text = out.getvalue()
    assert text.startswith("\r") and text.endswith("\n")  # redrawn in place, left at the end
    final = text.rstrip("\n").rsplit("\r", 1)[-1]
    assert final.startswith("scoring:") and "300/1000" in final and "30%" in final


def test_progress_quiet_on_a_terminal_prints_nothing() -> None:
    out = _Terminal()
    with Progress(total=10, stream=out, enabled=False) as p:
        p.update(10)
    assert out.getvalue() == "" and p.count == 10


def test_progress_survives_a_closed_stream() -> None:
    out = io.StringIO()
    out.close()
    p = Progress(stream=out, enabled=True, every_s=0.0)
    p.update()
    p.close()


def test_progress_survives_a_terminal_closed_midway() -> None:
    out = _Terminal()
    p = Progress(total=5, stream=out, every_s=0.0)
    out.close()
    p.update()
    p.close()  # nothing raised: progress never breaks the job it reports on


# --------------------------------------------------------------------------- properties

_lines = st.lists(st.text(max_size=80), max_size=30)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    lines=_lines, fmt=st.sampled_from([None, "txt", "jsonl"]), sep=st.sampled_from(["\n", "\r\n"])
)
def test_arbitrary_lines_never_raise(lines: list[str], fmt: str | None, sep: str) -> None:
    for source in (io.StringIO(sep.join(lines)), io.BytesIO(sep.join(lines).encode("utf-8"))):
        stats = ReadStats()
        try:
            records = list(read_records(source, fmt=fmt, stats=stats))
        except InputFormatError as exc:
            # a sniffed CSV/TSV header without 'url', or bytes holding NUL: "not a text
            # file" (git and grep call a file binary for a NUL in its first 8,000 bytes;
            # from memory, common practice)
            assert fmt is None or ("\x00" in "".join(lines) and "not a text" in str(exc))
            continue
        assert stats.records == len(records)
        assert stats.records + stats.bad <= stats.lines
        assert all(r.url and r.url == r.url.strip() and r.count >= 0 for r in records)


@settings(max_examples=100, deadline=None)
@given(data=st.binary(max_size=400), fmt=st.sampled_from(["txt", "jsonl", "csv"]))
def test_arbitrary_bytes_never_raise(data: bytes, fmt: str) -> None:
    stats = ReadStats()
    head = b"url,label\n" if fmt == "csv" else b""
    try:
        records = list(read_records(io.BytesIO(head + data), fmt=fmt, stats=stats))
    except InputFormatError as exc:
        # a corrupt gzip stream, or bytes that are not text (NUL, mostly invalid UTF-8)
        assert (data.startswith(b"\x1f\x8b") and not head) or "not " in str(exc), exc
        return
    assert stats.records == len(records)
    assert all("\ufffd" not in r.url for r in records)


@pytest.mark.parametrize("text, expected", [
    # RFC 3339 section 5.6 (an ISO 8601 profile): "Z" and numeric offsets; converted to UTC
    ("2026-10-09T20:20:40Z", "2026-10-09T20:20:40Z"),
    ("2026-10-09T22:20:40+02:00", "2026-10-09T20:20:40Z"),
    ("2026-10-09", "2026-10-09T00:00:00Z"),
    # epoch seconds: 1760041240 is 2025-10-09T20:20:40Z (checked with datetime.fromtimestamp)
    ("1760041240", "2025-10-09T20:20:40Z"),
])
def test_seen_at_is_parsed_to_one_utc_form(text: str, expected: str) -> None:
    from cascade.io import parse_seen_at

    assert parse_seen_at(text) == expected


def test_a_seen_at_that_is_not_a_time_is_a_bad_line(tmp_path) -> None:
    path = tmp_path / "times.csv"
    path.write_text("url,seen_at\nhttp://a.example/,2026-10-09\nhttp://b.example/,yesterday\n"
                    "http://c.example/,2026-13-01\n")
    stats = ReadStats()
    records = list(read_records(path, stats=stats))
    assert [r.url for r in records] == ["http://a.example/"]
    assert stats.bad == 2 and "seen_at" in stats.samples[0].reason
