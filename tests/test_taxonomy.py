"""Category files: the demo one loads, malformed ones are refused with a clear message."""

from __future__ import annotations

from pathlib import Path

import pytest

from cascade.errors import TaxonomyError
from cascade.taxonomy import Category, Taxonomy, demo_taxonomy, load_taxonomy


def test_demo_taxonomy_covers_harmless_and_high_risk() -> None:
    tax = demo_taxonomy()
    assert 12 <= len(tax) <= 16
    risks = {c.risk for c in tax.categories}
    assert risks == {"low", "high"}
    high = [c for c in tax.categories if c.risk == "high"]
    assert min(c.cost for c in high) > max(c.cost for c in tax.categories if c.risk == "low") - 1


def test_round_trip_through_dict() -> None:
    tax = demo_taxonomy()
    assert Taxonomy.from_dict(tax.to_dict()) == tax


def test_unknown_labels_are_listed() -> None:
    with pytest.raises(TaxonomyError, match="'astrology', 'knitting'"):
        demo_taxonomy().check_labels(["news", "knitting", "astrology", "news"])


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("[taxonomy]\nname='x'\n", "no \\[\\[category\\]\\]"),
        ("[[category]]\nname='a'\n[[category]]\nname='a'\n", "listed twice"),
        ("[[category]]\nname=' padded'\n", "must be 1-64 printable"),
        ("[[category]]\nname='a'\ncost=-1\n", "cost must be a positive"),
        ("[[category]]\nname='a'\nrisk='medium'\n", "risk must be one of"),
        ("[[category]]\nname='a'\ncolour='red'\n", "unknown keys"),
        ("[[category]\n", "not valid TOML"),
    ],
)
def test_malformed_files_are_refused(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "t.toml"
    path.write_text(text)
    with pytest.raises(TaxonomyError, match=message):
        load_taxonomy(path)


def test_missing_file_is_refused(tmp_path: Path) -> None:
    with pytest.raises(TaxonomyError, match="does not exist"):
        load_taxonomy(tmp_path / "nope.toml")


def test_costs_in_order() -> None:
    tax = Taxonomy("t", (Category("a", cost=1.0), Category("b", cost=4.0)))
    assert tax.costs().tolist() == [1.0, 4.0]
    assert tax.index("b") == 1
