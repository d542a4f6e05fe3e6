"""Tests for the invented scenario's telemetry generator."""

from __future__ import annotations

import csv
import gzip
import re
from collections import Counter, defaultdict
from datetime import UTC, datetime, timedelta
from pathlib import Path
from urllib.parse import urlsplit

import idna
import pytest

from cascade.errors import InputFormatError
from cascade.scenario import (
    CATEGORY_WORDS,
    SIGNALS,
    TELEMETRY_FIELDS,
    TelemetryRecord,
    generate_telemetry,
    read_telemetry_csv,
    write_telemetry_csv,
)
from cascade.taxonomy import demo_taxonomy

# Names reserved for testing and documentation: RFC 2606 and RFC 6761.
RESERVED = (".example", ".test", ".invalid", ".example.com", ".example.net", ".example.org")


@pytest.fixture(scope="module")
def records() -> list[TelemetryRecord]:
    return generate_telemetry(seed=0)


def _shares(records: list[TelemetryRecord], attr: str) -> dict[str, float]:
    counts = Counter(getattr(r, attr) for r in records)
    return {k: v / len(records) for k, v in counts.items()}


def test_same_seed_gives_same_records(scenario) -> None:
    # the session scenario was generated once already, with the same arguments
    assert generate_telemetry(seed=scenario.seed, n_sites=scenario.n_sites) == scenario.records


def test_different_seed_gives_different_records(scenario) -> None:
    other = generate_telemetry(seed=scenario.seed + 1, n_sites=scenario.n_sites)
    assert {r.url for r in other} != {r.url for r in scenario.records}


def test_default_size_is_about_ten_thousand_urls(records: list[TelemetryRecord]) -> None:
    assert 8_000 <= len(records) <= 12_000


def test_urls_are_unique_and_absolute_http(records: list[TelemetryRecord]) -> None:
    urls = [r.url for r in records]
    assert len(set(urls)) == len(urls)
    for url in urls:
        parts = urlsplit(url)
        assert parts.scheme in ("http", "https"), url
        assert parts.hostname, url


def test_urls_stay_unique_after_case_and_default_port_folding(
    records: list[TelemetryRecord],
) -> None:
    # RFC 3986 section 6.2.2.1 and 6.2.3: host case and a default port do not change a URL.
    def folded(url: str) -> str:
        parts = urlsplit(url)
        rest = url.split(parts.netloc, 1)[1]
        return f"{parts.scheme}://{parts.hostname}{rest}"

    assert len({folded(r.url) for r in records}) == len(records)


def test_every_label_is_a_demo_category_and_each_has_one_percent(
    records: list[TelemetryRecord],
) -> None:
    names = set(demo_taxonomy().names)
    shares = _shares(records, "label")
    assert set(shares) == names
    assert min(shares.values()) >= 0.01
    # Uneven on purpose: the common categories dwarf the rare ones.
    assert shares["news"] > 3 * shares["weapons"]


def test_vocabulary_covers_the_demo_taxonomy() -> None:
    assert set(CATEGORY_WORDS) == set(demo_taxonomy().names)
    assert all(25 <= len(words) <= 40 for words in CATEGORY_WORDS.values())


def test_every_host_ends_in_a_reserved_name(records: list[TelemetryRecord]) -> None:
    for rec in records:
        assert urlsplit(rec.url).hostname == rec.site, rec.url
    for host in {r.site for r in records}:
        assert idna.encode(host).decode("ascii").endswith(RESERVED), host


def test_some_hosts_are_internationalized(records: list[TelemetryRecord]) -> None:
    idn_hosts = {r.site for r in records if not r.site.isascii()}
    assert len(idn_hosts) >= 5
    assert all(idna.encode(h).decode("ascii").count("xn--") >= 1 for h in idn_hosts)


def test_signal_shares_fall_in_the_scenario_ranges(records: list[TelemetryRecord]) -> None:
    shares = _shares(records, "signal")
    assert set(shares) <= set(SIGNALS)
    assert 0.22 <= shares["opaque"] <= 0.38
    assert 0.06 <= shares["hosting"] <= 0.15
    assert 0.02 <= shares["misleading"] <= 0.07
    assert shares["clear"] >= 0.45


def test_opaque_hosts_carry_no_category_words(records: list[TelemetryRecord]) -> None:
    words = sorted({w for ws in CATEGORY_WORDS.values() for w in ws if len(w) >= 3}, key=len)
    pattern = re.compile("|".join(re.escape(w) for w in reversed(words)))
    for rec in records:
        if rec.signal != "opaque":
            continue
        name = next(rec.site[: -len(s)] for s in RESERVED if rec.site.endswith(s))
        brand = name.rsplit(".", 1)[-1]          # drop www., m., app. ...
        assert not pattern.search(brand), rec.url


def test_shared_hosts_carry_many_sites_of_different_categories(
    records: list[TelemetryRecord],
) -> None:
    labels_on: dict[str, set[str]] = defaultdict(set)
    for rec in records:
        if rec.signal == "hosting":
            # each user of *.sitecove.example has a subdomain; the shared host is the parent
            shared = "sitecove.example" if rec.site.endswith(".sitecove.example") else rec.site
            labels_on[shared].add(rec.label)
    assert len(labels_on) >= 5
    assert sum(len(v) >= 5 for v in labels_on.values()) >= 5


def test_counts_are_long_tailed(records: list[TelemetryRecord]) -> None:
    # A property chosen for the scenario (common practice, no source): a lookup log where
    # a few URLs take a large share of the traffic and most URLs are looked up once or twice.
    counts = sorted((r.count for r in records), reverse=True)
    top = counts[: len(counts) // 100]
    assert sum(top) / sum(counts) > 0.20
    assert counts[0] >= 1_000
    assert sum(c <= 3 for c in counts) / len(counts) >= 0.5
    assert min(counts) >= 1


def test_seen_at_is_utc_within_the_window_and_popular_urls_come_early(
    records: list[TelemetryRecord],
) -> None:
    start = datetime(2026, 9, 1, tzinfo=UTC)
    end = start + timedelta(weeks=6)
    times = []
    for rec in records:
        assert rec.seen_at.endswith("Z")
        t = datetime.fromisoformat(rec.seen_at)
        assert t.tzinfo is not None and start <= t < end
        times.append(t)
    assert times == sorted(times)
    by_count = sorted(records, key=lambda r: -r.count)
    top = sorted(r.seen_at for r in by_count[: len(records) // 100])
    every = sorted(r.seen_at for r in records)
    assert top[len(top) // 2] < every[len(every) // 2]


def test_page_seed_is_a_per_url_integer(records: list[TelemetryRecord]) -> None:
    seeds = [r.page_seed for r in records]
    assert all(0 <= s < 2**63 for s in seeds)
    assert len(set(seeds)) == len(seeds)


def test_small_runs_respect_urls_per_site() -> None:
    small = generate_telemetry(seed=3, n_sites=50, urls_per_site=(2, 3), weeks=1)
    per_site = Counter(r.site for r in small if r.signal != "hosting")
    assert per_site and all(2 <= n <= 3 for n in per_site.values())


def test_bad_arguments_are_refused() -> None:
    with pytest.raises(ValueError, match="n_sites"):
        generate_telemetry(n_sites=0)
    with pytest.raises(ValueError, match="urls_per_site"):
        generate_telemetry(urls_per_site=(5, 2))
    with pytest.raises(ValueError, match="start"):
        generate_telemetry(start="September")


@pytest.mark.parametrize("name", ["telemetry.csv", "telemetry.csv.gz"])
def test_csv_round_trip(records: list[TelemetryRecord], tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    assert write_telemetry_csv(records, path) == len(records)
    assert read_telemetry_csv(path) == records
    opener = gzip.open if name.endswith(".gz") else open
    with opener(path, "rt", encoding="utf-8", newline="") as fh:
        assert tuple(next(csv.reader(fh))) == TELEMETRY_FIELDS


def test_reading_a_foreign_csv_fails_with_a_clear_error(tmp_path: Path) -> None:
    path = tmp_path / "other.csv"
    path.write_text("url,label\nhttps://a.example/,news\n", encoding="utf-8")
    with pytest.raises(InputFormatError, match="header"):
        read_telemetry_csv(path)


def _real_host_labels() -> list[list[str]]:
    # open datasets in shared/data (see their SOURCE.md): real host and domain names
    root = Path(__file__).resolve().parents[2] / "shared" / "data"
    labels = []
    for path in (root / "open-directory-hosts" / "hosts.csv",
                 root / "domain-categories" / "domains.csv"):
        if not path.exists():
            pytest.skip(f"{path} is not here (shared data sets)")
        with path.open(encoding="utf-8") as fh:
            rows = csv.reader(fh)
            next(rows)
            labels += [row[0].lower().split("//")[-1].split("/")[0].split(".") for row in rows
                       if row]
    return labels


def test_invented_names_start_with_the_scenarios_own_onsets() -> None:
    import random

    from cascade.scenario.telemetry import SIGNATURE_ONSETS, _invented_word

    r = random.Random(0)
    words = [_invented_word(r) for _ in range(2000)]
    assert all(w.startswith(SIGNATURE_ONSETS) for w in words)
    # and those onsets almost never start a label of a real host name
    real = _real_host_labels()
    for onset in SIGNATURE_ONSETS:
        starting = sum(any(label.startswith(onset) for label in host) for host in real)
        assert starting <= 6, (onset, starting, len(real))


def test_no_invented_brand_is_a_real_host_label(records: list[TelemetryRecord]) -> None:
    real = {label for host in _real_host_labels() for label in host if len(label) >= 4}
    brands = set()
    for rec in records:
        if rec.signal != "opaque":
            continue
        name = next(rec.site[: -len(s)] for s in RESERVED if rec.site.endswith(s))
        brands.add(name.rsplit(".", 1)[-1])
    assert brands and not (brands & real), sorted(brands & real)[:10]
