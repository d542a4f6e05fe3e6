"""Which URLs are worth a fetch: a fetch budget, per-domain fetch costs, and the plan.

The method is value-of-information ranking: for each URL, the expected reduction in
misclassification cost that fetching its page would bring (from the fetch-value model,
``cascade.fetch_value``), divided by the expected cost of the fetch, taken greedily until
the budget is spent.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from cascade._validation import check_proba
from cascade.fetch_value import DomainHistory, FetchValueModel, confidence_gain
from cascade.verdict import Reason

__all__ = ["Budget", "FetchCosts", "Plan", "PlanItem", "plan"]


# ----------------------------------------------------------------------------- budget


_SIZE = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*([kmgt]?i?b?)?\s*$", re.IGNORECASE)
_UNITS = {"": 1, "b": 1, "k": 10**3, "kb": 10**3, "kib": 2**10, "m": 10**6, "mb": 10**6,
          "mib": 2**20, "g": 10**9, "gb": 10**9, "gib": 2**30, "t": 10**12, "tb": 10**12,
          "tib": 2**40}


@dataclass(frozen=True)
class Budget:
    """What a run may spend on fetches. Every limit given holds at once; none is exceeded.

    ``max_fetches`` and ``max_fraction`` (of the URLs offered to the planner) cap the count;
    ``max_bytes`` and ``max_seconds`` cap the expected bytes and the summed fetch time
    (fetch-seconds, not wall time: fetches run concurrently). ``Budget()`` limits nothing:
    fetch everything worth fetching.
    """

    max_fetches: int | None = None
    max_fraction: float | None = None
    max_bytes: int | None = None
    max_seconds: float | None = None

    def __post_init__(self) -> None:
        if self.max_fetches is not None and (int(self.max_fetches) != self.max_fetches
                                             or self.max_fetches < 0):
            raise ValueError(f"max_fetches must be a whole number >= 0, not {self.max_fetches}")
        if self.max_fraction is not None and not 0.0 <= self.max_fraction <= 1.0:
            raise ValueError(f"max_fraction must lie in [0, 1], not {self.max_fraction}")
        for name in ("max_bytes", "max_seconds"):
            value = getattr(self, name)
            if value is not None and not (value >= 0 and math.isfinite(value)):
                raise ValueError(f"{name} must be a finite number >= 0, not {value}")

    @classmethod
    def parse(cls, count: str | None = None, bytes_: str | None = None,
              seconds: str | None = None) -> Budget:
        """From command-line text: a number of fetches (``"500"``) or a share of the URLs
        (``"10%"`` or ``"0.1"``, see ``parse_share``); ``"50MB"``/``"2GiB"``; ``"3600"``.
        Every command reads a budget with this one parser."""
        fetches = fraction = None
        if count is not None:
            text = count.strip()
            if re.fullmatch(r"\+?\d+", text):
                fetches = int(text)
            else:
                try:
                    fraction = parse_share(text, what="budget")
                except ValueError:
                    raise ValueError(f"budget {count!r}: give a number of fetches (500) or a "
                                     "share of the URLs (10% or 0.1)") from None
        max_bytes = None
        if bytes_ is not None:
            m = _SIZE.match(bytes_)
            unit = (m.group(2) or "").lower() if m else None
            if not m or unit not in _UNITS:
                raise ValueError(f"byte budget {bytes_!r}: give a size such as 500MB or 2GiB")
            max_bytes = int(float(m.group(1)) * _UNITS[unit])
        max_seconds = None
        if seconds is not None:
            try:
                max_seconds = float(seconds)
            except ValueError:
                raise ValueError(f"seconds budget {seconds!r} is not a number") from None
        return cls(fetches, fraction, max_bytes, max_seconds)

    def count_limit(self, n_urls: int) -> int:
        """The most fetches allowed among ``n_urls`` offered URLs."""
        limit = n_urls
        if self.max_fetches is not None:
            limit = min(limit, int(self.max_fetches))
        if self.max_fraction is not None:
            limit = min(limit, int(math.floor(self.max_fraction * n_urls + 1e-9)))
        return limit

    def describe(self) -> dict[str, Any]:
        return {k: v for k, v in (("max_fetches", self.max_fetches),
                                  ("max_fraction", self.max_fraction),
                                  ("max_bytes", self.max_bytes),
                                  ("max_seconds", self.max_seconds)) if v is not None}


def parse_share(text: str, what: str = "share") -> float:
    """A share of the URLs from command-line text: ``"30%"`` or ``"0.3"`` (a number from 0 to
    1). The one reading of a share for every command (``--budget``, ``--operating-budget``)."""
    raw = str(text).strip()
    try:
        value = float(raw[:-1]) / 100.0 if raw.endswith("%") else float(raw)
    except ValueError:
        raise ValueError(f"{what} {text!r}: give a share of the URLs, such as 30% or "
                         "0.3") from None
    if re.fullmatch(r"\+?0*[1-9]\d*", raw):
        raise ValueError(f"{what} {text!r}: a whole number reads as a count of fetches; "
                         "here a share of the URLs is needed, such as 30% or 0.3")
    if not (math.isfinite(value) and 0.0 <= value <= 1.0):
        raise ValueError(f"{what} {text!r}: a share is between 0 and 1 (or 0% and 100%)")
    return value


# ------------------------------------------------------------------------ fetch costs


@dataclass(frozen=True)
class _Stat:
    n: float
    failures: float
    bytes: float
    seconds: float


@dataclass(frozen=True)
class FetchCosts:
    """What a fetch costs, learned per registered domain (then per suffix) from history.

    With no history every fetch costs the same: ``default_bytes``, ``default_seconds``, and
    a failure chance of ``default_failure``. Per-domain figures are shrunk towards the
    suffix's, and those towards the global ones, with ``prior_weight`` pseudo-fetches
    (empirical Bayes), so one failed fetch does not condemn a domain.
    """

    default_bytes: float = 60_000.0
    default_seconds: float = 0.5
    default_failure: float = 0.0
    prior_weight: float = 5.0
    domains: Mapping[str, _Stat] = field(default_factory=dict)
    suffixes: Mapping[str, _Stat] = field(default_factory=dict)
    overall: _Stat | None = None

    @classmethod
    def from_history(cls, rows: Iterable[Mapping[str, Any]], prior_weight: float = 5.0,
                     **defaults: float) -> FetchCosts:
        """Rows with ``domain``, ``ok`` (bool), ``bytes`` and ``seconds`` (or ``ms``)."""
        agg: dict[str, list[float]] = {}
        for n, row in enumerate(rows, 1):
            domain = str(row.get("domain") or "")
            ok = bool(row.get("ok"))
            nbytes = float(row.get("bytes") or 0.0)
            secs = float(row["seconds"]) if row.get("seconds") is not None else \
                float(row.get("ms") or 0.0) / 1000.0
            if not (math.isfinite(nbytes) and math.isfinite(secs) and nbytes >= 0
                    and secs >= 0):
                raise ValueError(f"fetch history row {n}: bytes and time must be finite "
                                 f"numbers >= 0, got bytes={nbytes}, seconds={secs}")
            for key in (f"d:{domain}", f"s:{_suffix(domain)}", "all"):
                a = agg.setdefault(key, [0.0, 0.0, 0.0, 0.0])
                a[0] += 1
                a[1] += 0.0 if ok else 1.0
                a[2] += nbytes
                a[3] += secs
        stats = {k: _Stat(*v) for k, v in agg.items()}
        return cls(prior_weight=prior_weight,
                   domains={k[2:]: v for k, v in stats.items() if k.startswith("d:")},
                   suffixes={k[2:]: v for k, v in stats.items() if k.startswith("s:")},
                   overall=stats.get("all"), **defaults)

    def _shrink(self, stat: _Stat | None, prior: tuple[float, float, float]) -> tuple:
        if stat is None or stat.n <= 0:
            return prior
        k = self.prior_weight
        return ((stat.failures + k * prior[0]) / (stat.n + k),
                (stat.bytes + k * prior[1]) / (stat.n + k),
                (stat.seconds + k * prior[2]) / (stat.n + k))

    def estimate(self, domain: str) -> tuple[float, float, float]:
        """(failure chance, expected bytes, expected seconds) of fetching from ``domain``.

        Unknown domains take the figures of their top-level label (``uk`` for ``a.co.uk``),
        then the overall ones."""
        base = (self.default_failure, self.default_bytes, self.default_seconds)
        overall = self._shrink(self.overall, base)
        suffix = self._shrink(self.suffixes.get(_suffix(domain)), overall)
        return self._shrink(self.domains.get(domain), suffix)


def _suffix(domain: str) -> str:
    """The top-level label: a coarse group for domains with no history of their own."""
    return domain.rsplit(".", 1)[-1] if domain else ""


# ------------------------------------------------------------------------------ plan


@dataclass(frozen=True)
class PlanItem:
    """One URL offered to the planner, and what the planner decided about it."""

    index: int            # position in the input
    url: str
    gain: float           # expected cost saved, x lookups, x chance the fetch succeeds
    cost: float           # the fetch's share of the budget (see ``plan``)
    p_wrong: float
    p_fix: float
    expected_bytes: float
    expected_seconds: float
    fetch: bool
    rank: int | None      # order in the fetch list, None if left out
    reason: str           # "selected", "no-gain", "budget:count", "budget:bytes", ...

    def to_dict(self) -> dict[str, Any]:
        return {"url": self.url, "fetch": self.fetch, "rank": self.rank, "reason": self.reason,
                "expected_gain": round(self.gain, 6), "cost": round(self.cost, 6),
                "p_wrong": round(self.p_wrong, 4), "p_fix": round(self.p_fix, 4),
                "expected_bytes": round(self.expected_bytes),
                "expected_seconds": round(self.expected_seconds, 3)}


@dataclass(frozen=True)
class Plan:
    """The fetch list, best first, and every URL left out with its reason."""

    items: tuple[PlanItem, ...]
    budget: Budget
    totals: dict[str, float]

    @property
    def fetch(self) -> list[PlanItem]:
        return sorted((i for i in self.items if i.fetch), key=lambda i: i.rank or 0)

    @property
    def skipped(self) -> list[PlanItem]:
        return [i for i in self.items if not i.fetch]

    def order(self) -> np.ndarray:
        """Input indices in fetch order."""
        return np.array([i.index for i in self.fetch], dtype=np.int64)


def plan(
    urls: Sequence[str],
    url_proba: np.ndarray,
    value_model: FetchValueModel | None,
    budget: Budget,
    counts: Sequence[float] | None = None,
    domains: Sequence[str] | None = None,
    fetch_costs: FetchCosts | None = None,
    history: DomainHistory | None = None,
    min_gain: float = 0.0,
    costs: np.ndarray | None = None,
) -> Plan:
    """Choose which of ``urls`` to fetch: best expected gain per unit of cost first.

    A fetch's cost is its share of each limited resource (1/count limit, expected bytes /
    byte limit, expected seconds / seconds limit), summed; with only a count limit every
    fetch costs the same and the order is by gain. URLs are taken greedily; one that would
    overrun a limit is left out with that limit as its reason and smaller ones may still
    fit. URLs whose expected gain is not above ``min_gain`` are never fetched.

    Without a fetch-value model (a URL-only model directory) the gain falls back to the calibrated
    chance that the URL verdict is wrong times the expected cost of that mistake, i.e.
    lowest-confidence-first weighted by cost (``costs``, per category; default all 1)
    and lookups. ``history`` (what the store knows of each domain) feeds the fetch-value model's
    domain features; without it every URL is a first visit.
    """
    n = len(urls)
    pu = check_proba(np.atleast_2d(url_proba), n, "url_proba") if n else np.zeros((0, 1))
    w = np.ones(n) if counts is None else np.asarray(counts, dtype=np.float64)
    if w.shape != (n,) or (w < 0).any() or not np.isfinite(w).all():
        raise ValueError("counts must be one finite number >= 0 per URL")
    doms = list(domains) if domains is not None else [""] * n
    per_fetch = fetch_costs or FetchCosts()
    if n and value_model is not None:
        est = value_model.expected_gain(pu, doms if domains is not None else None, history,
                                        urls=[str(u) for u in urls])
    elif n:
        est = confidence_gain(pu, np.ones(pu.shape[1]) if costs is None else costs)
    else:
        est = {k: np.zeros(0) for k in ("gain", "p_wrong", "p_fix")}
    fail, exp_bytes, exp_secs = (np.array(v, dtype=np.float64).reshape(n) for v in
                                 zip(*[per_fetch.estimate(d) for d in doms], strict=True)) \
        if n else (np.zeros(0),) * 3
    value = est["gain"] * (1.0 - fail) * w
    count_limit = budget.count_limit(n)
    unit = np.zeros(n)
    if count_limit < n:
        unit += 1.0 / max(count_limit, 1)
    if budget.max_bytes is not None:
        unit += exp_bytes / max(budget.max_bytes, 1.0)
    if budget.max_seconds is not None:
        unit += exp_secs / max(budget.max_seconds, 1e-9)
    unit = np.where(unit > 0, unit, 1.0)
    score = value / unit
    order = np.lexsort((np.arange(n), -score))  # stable: ties keep input order
    taken = 0
    spent_bytes = spent_secs = 0.0
    decided: dict[int, tuple[bool, int | None, str]] = {}
    for i in order:
        i = int(i)
        if not value[i] > min_gain:
            decided[i] = (False, None, Reason.NO_GAIN)
        elif taken >= count_limit:
            decided[i] = (False, None, Reason.BUDGET_COUNT)
        elif budget.max_bytes is not None and spent_bytes + exp_bytes[i] > budget.max_bytes:
            decided[i] = (False, None, Reason.BUDGET_BYTES)
        elif budget.max_seconds is not None and spent_secs + exp_secs[i] > budget.max_seconds:
            decided[i] = (False, None, Reason.BUDGET_SECONDS)
        else:
            taken += 1
            spent_bytes += exp_bytes[i]
            spent_secs += exp_secs[i]
            decided[i] = (True, taken, Reason.SELECTED)
    items = tuple(
        PlanItem(index=i, url=str(urls[i]), gain=float(value[i]), cost=float(unit[i]),
                 p_wrong=float(est["p_wrong"][i]), p_fix=float(est["p_fix"][i]),
                 expected_bytes=float(exp_bytes[i]), expected_seconds=float(exp_secs[i]),
                 fetch=decided[i][0], rank=decided[i][1], reason=decided[i][2])
        for i in range(n))
    totals = {"urls": n, "fetches": taken, "expected_bytes": round(float(spent_bytes)),
              "expected_seconds": round(float(spent_secs), 3),
              "expected_gain": round(float(value[[i for i in range(n) if decided[i][0]]].sum())
                                     if taken else 0.0, 6)}
    return Plan(items, budget, totals)
