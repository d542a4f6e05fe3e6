"""What drove a linear model's verdict: exact per-feature shares of each class logit.

For a linear model the decomposition is exact (``logit = bias + sum of contributions``), so
an analyst can read which substrings of a URL, or which words of a page, pushed the verdict
where. Shared by the URL model and the page model.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

__all__ = ["ClassExplanation", "Contribution", "Explanation", "Span"]


@dataclass(frozen=True)
class Contribution:
    """One feature's exact share of a class logit (after temperature)."""

    feature: str  # the substring or token, e.g. "odds" or "path:casino"
    kind: str  # "chars" or "token"
    value: float  # contribution to the class logit


@dataclass(frozen=True)
class Span:
    """A stretch of the URL's text and its exact share of a class logit: every character
    n-gram's contribution is spread evenly over its characters, and neighbouring characters
    pushing the same way are joined, so overlapping fragments ("rox", "ox", "roxy") read as
    one quoted span. ``place`` is ``host`` or ``path`` (path and query)."""

    text: str
    place: str
    value: float


@dataclass(frozen=True)
class ClassExplanation:
    category: str
    probability: float
    logit: float
    bias: float
    contributions: tuple[Contribution, ...]
    spans: tuple[Span, ...] = ()


@dataclass(frozen=True)
class Explanation:
    """Why the model gave its probabilities: for a linear model the decomposition is exact:
    ``logit = bias + sum(all contributions)`` (the top ones are listed, ``rest`` holds the
    sum of the others)."""

    url: str
    classes: tuple[ClassExplanation, ...] = field(default_factory=tuple)
    rest: tuple[float, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        return {
            "url": self.url,
            "classes": [
                {
                    "category": c.category,
                    "probability": round(c.probability, 6),
                    "logit": round(c.logit, 6),
                    "bias": round(c.bias, 6),
                    "others": round(r, 6),
                    "top": [
                        {"feature": f.feature, "kind": f.kind, "value": round(f.value, 6)}
                        for f in c.contributions
                    ],
                    **({"spans": [{"text": sp.text, "place": sp.place,
                                   "value": round(sp.value, 6)} for sp in c.spans]}
                       if c.spans else {}),
                }
                for c, r in zip(self.classes, self.rest, strict=True)
            ],
        }
