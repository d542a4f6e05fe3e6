"""The user's category set: names, one-line descriptions, a misclassification cost each.

Categories come from a TOML file the user writes (see ``cascade/data/demo-taxonomy.toml``
for the format). cascade has no built-in category list: the demo one is an example.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np

from cascade.errors import TaxonomyError

__all__ = ["Category", "RISK_LEVELS", "Taxonomy", "demo_taxonomy", "load_taxonomy"]

# A name is what reports and verdicts print: 1-64 printable characters, no outer spaces.
_NAME = re.compile(r"^[^\s\x00-\x1f\x7f](?:[^\x00-\x1f\x7f]{0,62}[^\s\x00-\x1f\x7f])?$")
RISK_LEVELS = ("low", "high")


@dataclass(frozen=True)
class Category:
    """One category: a short machine name, what it covers, and what missing it costs."""

    name: str
    description: str = ""
    cost: float = 1.0
    risk: str = "low"


@dataclass(frozen=True)
class Taxonomy:
    """An ordered, validated set of categories."""

    name: str
    categories: tuple[Category, ...]
    version: int = 1

    def __post_init__(self) -> None:
        if not self.categories:
            raise TaxonomyError(f"taxonomy {self.name!r} has no categories")
        seen: set[str] = set()
        for cat in self.categories:
            if not _NAME.match(cat.name):
                raise TaxonomyError(
                    f"category name {cat.name!r} must be 1-64 printable characters with no "
                    "leading or trailing space"
                )
            if cat.name in seen:
                raise TaxonomyError(f"category {cat.name!r} is listed twice")
            if not (cat.cost > 0 and np.isfinite(cat.cost)):
                raise TaxonomyError(f"category {cat.name!r}: cost must be a positive number")
            if cat.risk not in RISK_LEVELS:
                raise TaxonomyError(
                    f"category {cat.name!r}: risk must be one of {RISK_LEVELS}, not {cat.risk!r}"
                )
            seen.add(cat.name)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.categories)

    def __len__(self) -> int:
        return len(self.categories)

    def __contains__(self, name: object) -> bool:
        return name in self.names

    def index(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise TaxonomyError(f"{name!r} is not a category of taxonomy {self.name!r}") from None

    def costs(self, names: Sequence[str] | None = None) -> np.ndarray:
        """Cost weight per category, in taxonomy order or in the order of ``names``."""
        if names is None:
            return np.array([c.cost for c in self.categories], dtype=np.float64)
        return np.array([self.categories[self.index(n)].cost for n in names],
                        dtype=np.float64)

    def encode(self, labels: Sequence[str]) -> np.ndarray:
        """Class indices (taxonomy order) of ``labels``; ``TaxonomyError`` lists unknown ones."""
        self.check_labels(labels)
        index = {c: i for i, c in enumerate(self.names)}
        return np.array([index[lab] for lab in labels], dtype=np.int64)

    def check_labels(self, labels: Iterable[str]) -> None:
        """Raise ``TaxonomyError`` listing every label that is not a category here."""
        known = set(self.names)
        unknown = sorted({str(lab) for lab in labels} - known)
        if unknown:
            shown = ", ".join(repr(u) for u in unknown[:20])
            more = f" and {len(unknown) - 20} more" if len(unknown) > 20 else ""
            raise TaxonomyError(
                f"{len(unknown)} training label(s) are not categories of taxonomy "
                f"{self.name!r}: {shown}{more}. Add them to the taxonomy file or fix the labels."
            )

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "version": self.version,
            "categories": [
                {"name": c.name, "description": c.description, "cost": c.cost, "risk": c.risk}
                for c in self.categories
            ],
        }

    @classmethod
    def from_dict(cls, data: dict) -> Taxonomy:
        try:
            cats = tuple(
                Category(
                    name=str(c["name"]),
                    description=str(c.get("description", "")),
                    cost=float(c.get("cost", 1.0)),
                    risk=str(c.get("risk", "low")),
                )
                for c in data["categories"]
            )
            return cls(name=str(data.get("name", "unnamed")), categories=cats,
                       version=int(data.get("version", 1)))
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, TaxonomyError):
                raise
            raise TaxonomyError(f"malformed taxonomy: {exc}") from exc

    @classmethod
    def from_labels(cls, labels: Sequence[str], name: str = "from-labels") -> Taxonomy:
        """A taxonomy of the distinct labels seen, each with cost 1 (for data that has no file)."""
        return cls(name=name, categories=tuple(Category(str(n)) for n in sorted(set(labels))))


def load_taxonomy(path: str | Path) -> Taxonomy:
    """Read a taxonomy TOML file: a ``[taxonomy]`` table and ``[[category]]`` entries."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TaxonomyError(f"taxonomy file {str(path)!r} does not exist") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise TaxonomyError(f"taxonomy file {str(path)!r} is not valid TOML: {exc}") from exc
    head = data.get("taxonomy", {})
    cats = data.get("category")
    if not isinstance(cats, list):
        raise TaxonomyError(
            f"taxonomy file {str(path)!r} has no [[category]] entries"
        )
    for i, c in enumerate(cats):
        if not isinstance(c, dict) or "name" not in c:
            raise TaxonomyError(f"taxonomy file {str(path)!r}: category #{i + 1} has no name")
        extra = set(c) - {"name", "description", "cost", "risk"}
        if extra:
            raise TaxonomyError(
                f"taxonomy file {str(path)!r}: category {c['name']!r} has unknown keys "
                f"{sorted(extra)}; allowed are name, description, cost, risk"
            )
    return Taxonomy.from_dict(
        {"name": head.get("name", path.stem), "version": head.get("version", 1), "categories": cats}
    )


def demo_taxonomy() -> Taxonomy:
    """The invented demo scenario's category set, shipped with the package."""
    ref = resources.files("cascade") / "data" / "demo-taxonomy.toml"
    with resources.as_file(ref) as p:
        return load_taxonomy(p)
