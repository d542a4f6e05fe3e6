"""docs/architecture.md against the code: every module it names exists, every module is
named, and its table of stages, reasons and fetch outcomes is the code's vocabulary."""

from __future__ import annotations

import re
from pathlib import Path

from cascade.fetch import FetchOutcome
from cascade.verdict import Reason, Stage

ROOT = Path(__file__).resolve().parent.parent
DOC = (ROOT / "docs" / "architecture.md").read_text(encoding="utf-8")


def test_every_named_module_exists_and_every_module_is_named() -> None:
    named = set(re.findall(r"`(cascade/[A-Za-z0-9_/.-]+\.[a-z]+)`", DOC))
    assert named and all((ROOT / p).exists() for p in named), \
        sorted(p for p in named if not (ROOT / p).exists())
    modules = {p.relative_to(ROOT).as_posix() for p in (ROOT / "cascade").rglob("*.py")}
    assert not modules - named, sorted(modules - named)


def test_the_vocabulary_table_is_the_codes() -> None:
    rows = dict(re.findall(r"^\| `((?:Stage|Reason|FetchOutcome)\.[A-Z_]+)` \| `([^`]+)`",
                           DOC, flags=re.M))
    code = {f"{enum.__name__}.{m.name}": m.value
            for enum in (Stage, Reason, FetchOutcome) for m in enum}
    assert rows == code
