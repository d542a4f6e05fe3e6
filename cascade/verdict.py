"""The ``Verdict``: what cascade decided for one URL, how sure it is, and at which stage.

Categories are probabilities, not facts: a filtering service that blocks on them should use
``confidence`` and ``stage``, and the policy owner decides what to block.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

STAGES = ("url", "page", "label")


def utc_now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


@dataclass(frozen=True)
class Verdict:
    """One URL's category. ``confidence`` is the calibrated probability of ``category``;
    ``top`` the k best ``(category, probability)``; ``stage`` is ``"url"`` (URL model only),
    ``"page"`` (page text fused in) or ``"label"`` (an analyst's label); ``reason`` says why
    this stage (``"confident"``, ``"under-threshold"``, ``"budget-exhausted"``,
    ``"fetch:timeout"``, ...)."""

    url: str
    category: str
    confidence: float
    top: tuple[tuple[str, float], ...]
    stage: str
    needs_fetch: bool
    reason: str
    model_version: str
    decided_at: str = field(default_factory=utc_now)

    def __post_init__(self) -> None:
        if self.stage not in STAGES:
            raise ValueError(f"stage must be one of {STAGES}, not {self.stage!r}")

    def to_dict(self) -> dict[str, Any]:
        return {
            "url": self.url,
            "category": self.category,
            "confidence": round(self.confidence, 6),
            "top": [[c, round(p, 6)] for c, p in self.top],
            "stage": self.stage,
            "needs_fetch": self.needs_fetch,
            "reason": self.reason,
            "model_version": self.model_version,
            "decided_at": self.decided_at,
        }


def url_verdicts(
    urls: list[str],
    proba: np.ndarray,
    classes: list[str],
    model_version: str,
    fetch_below: float = 0.8,
    top_k: int = 3,
) -> list[Verdict]:
    """URL-stage verdicts from a probability matrix: a verdict whose confidence is under
    ``fetch_below`` is marked ``needs_fetch`` (the budget planner decides what is fetched)."""
    now = utc_now()
    k = min(top_k, len(classes))
    order = np.argsort(-proba, axis=1)[:, :k]
    out = []
    for i, url in enumerate(urls):
        best = order[i]
        conf = float(proba[i, best[0]])
        needs = conf < fetch_below
        out.append(Verdict(
            url=url,
            category=classes[best[0]],
            confidence=conf,
            top=tuple((classes[j], float(proba[i, j])) for j in best),
            stage="url",
            needs_fetch=needs,
            reason="under-threshold" if needs else "confident",
            model_version=model_version,
            decided_at=now,
        ))
    return out
