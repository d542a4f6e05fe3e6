"""The ``Verdict``: what cascade decided for one URL, how sure it is, and at which stage.

Categories are probabilities, not facts: a filtering service that blocks on them should use
``confidence`` and ``stage``, and the policy owner decides what to block.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np

__all__ = ["STAGES", "Reason", "Stage", "Verdict", "fetch_reason", "url_verdicts", "utc_now"]


class Stage(StrEnum):
    """Which stage decided a verdict."""

    URL = "url"  # the URL model alone
    PAGE = "page"  # the page text fused with the URL model
    LABEL = "label"  # an analyst's label: always wins over a model's verdict


class Reason(StrEnum):
    """Why a verdict (or a plan entry) is what it is: one vocabulary for the planner, the
    fetch meter, fusion and every verdict. docs/architecture.md has the table."""

    # URL stage, no plan involved
    CONFIDENT = "confident"  # confidence at or above the fetch threshold
    UNDER_THRESHOLD = "under-threshold"  # below it: worth refining when the budget allows
    # the planner's decision for one URL
    SELECTED = "selected"  # in the fetch list
    NO_GAIN = "no-gain"  # a fetch is not expected to improve the verdict
    BUDGET_COUNT = "budget:count"  # left out: the count (or share) limit was reached
    BUDGET_BYTES = "budget:bytes"  # left out: it would pass the byte limit
    BUDGET_SECONDS = "budget:seconds"  # left out: it would pass the fetch-seconds limit
    # after a planned fetch
    FUSED = "fused"  # page text fused in (stage "page")
    PAGE_THIN = "page:thin"  # the page has too few words to trust; URL verdict kept
    PAGE_NONE = "page:none"  # no fetch result for this URL; URL verdict kept
    NO_PAGE_MODEL = "no-page-model"  # the model directory has no page model
    # an analyst
    ANALYST = "analyst"  # stage "label"
    # the embedded service (cascade.service), answering from the store
    DOMAIN = "domain"  # the store's verdict for the URL's registered domain
    STALE = "stale"  # a stored verdict past its time-to-live: served, and queued again


def fetch_reason(outcome: object) -> str:
    """The reason of a verdict whose fetch failed: ``fetch:`` and the ``FetchOutcome`` code
    (``fetch:timeout``, ``fetch:blocked-address``, ...)."""
    return f"fetch:{outcome}"


STAGES = tuple(s.value for s in Stage)


def utc_now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


@dataclass(frozen=True)
class Verdict:
    """One URL's category. ``confidence`` is the calibrated probability of ``category``;
    ``top`` the k best ``(category, probability)``; ``stage`` is ``"url"`` (URL model only),
    ``"page"`` (page text fused in) or ``"label"`` (an analyst's label); ``reason`` says why
    this stage (a ``Reason`` such as ``"confident"``, ``"budget:count"``, ``"fused"``, or
    ``"fetch:<outcome>"``)."""

    url: str
    category: str
    confidence: float
    top: tuple[tuple[str, float], ...]
    stage: Stage | str
    needs_fetch: bool
    reason: Reason | str
    model_version: str
    decided_at: str = field(default_factory=utc_now)

    def __post_init__(self) -> None:
        if self.stage not in STAGES:
            raise ValueError(f"stage must be one of {STAGES}, not {self.stage!r}")
        object.__setattr__(self, "stage", Stage(self.stage))

    def to_dict(self) -> dict[str, Any]:
        return {
            "url": self.url,
            "category": self.category,
            "confidence": round(self.confidence, 6),
            "top": [[c, round(p, 6)] for c, p in self.top],
            "stage": str(self.stage),
            "needs_fetch": self.needs_fetch,
            "reason": str(self.reason),
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
            stage=Stage.URL,
            needs_fetch=needs,
            reason=Reason.UNDER_THRESHOLD if needs else Reason.CONFIDENT,
            model_version=model_version,
            decided_at=now,
        ))
    return out
