"""Which URLs are worth a fetch: a fetch budget, a cost model, and the plan.

The method is value-of-information ranking: for each URL, the expected reduction in
misclassification cost that fetching its page would bring, divided by the expected cost
of the fetch, taken greedily until the budget is spent.

The cost model learns, from rows where both the URL-only verdict and the fused verdict are
known (the stacking rows of training, ``ModelBundle.held_out``), the chance of each of four
outcomes of a fetch from URL-model features only: the URL verdict was right and stays right,
was right and the page breaks it, was wrong and the page fixes it, was wrong and stays wrong.
The expected gain of a fetch is then

    P(fix) x E[cost of the true category | URL verdict wrong] - P(break) x cost(URL verdict)

with the costs from the taxonomy (missing a high-risk category weighs more), scaled by the
chance that the fetch succeeds at all and by how often the URL is looked up.
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from cascade import __version__
from cascade.errors import ModelFileError, NotFittedError
from cascade.models.model_files import load_model_dir, save_model_dir

__all__ = [
    "MIN_COST_ROWS",
    "OUTCOMES",
    "Budget",
    "confidence_gain",
    "CostModel",
    "DomainHistory",
    "FetchCosts",
    "Plan",
    "PlanItem",
    "fetch_outcomes",
    "plan",
]

KIND = "cost-model"
#: Fewest held-out rows a cost model is fitted on.
MIN_COST_ROWS = 10
#: The four outcomes of a fetch, as (URL verdict right?, fused verdict right?).
OUTCOMES = ("kept-right", "broke", "fixed", "kept-wrong")
_FLOOR = 1e-12


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
        """From command-line text: ``"500"`` or ``"10%"``; ``"50MB"``/``"2GiB"``; ``"3600"``."""
        fetches = fraction = None
        if count is not None:
            text = count.strip()
            try:
                if text.endswith("%"):
                    fraction = float(text[:-1]) / 100.0
                else:
                    fetches = int(text)
            except ValueError:
                raise ValueError(f"budget {count!r}: give a number of fetches (500) or a "
                                 "share of the URLs (10%)") from None
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


# ---------------------------------------------------------------------- domain history


@dataclass(frozen=True)
class DomainHistory:
    """What the verdict store knows about a registered domain: how many of its URLs have a
    page-stage verdict, by category. Used as cost-model features (a domain whose pages all
    came back as one category makes a fetch of another of its URLs worth less)."""

    counts: Mapping[str, Mapping[int, int]] = field(default_factory=dict)

    @classmethod
    def from_rows(cls, domains: Sequence[str], categories: Sequence[int]) -> DomainHistory:
        counts: dict[str, dict[int, int]] = {}
        for d, c in zip(domains, categories, strict=True):
            per = counts.setdefault(str(d), {})
            per[int(c)] = per.get(int(c), 0) + 1
        return cls(counts)

    def features(self, domain: str, predicted: int, leave_out: int | None = None
                 ) -> tuple[float, float]:
        """(log1p(known page verdicts), share of them equal to ``predicted``)."""
        per = self.counts.get(domain, {})
        total = sum(per.values())
        same = per.get(predicted, 0)
        if leave_out is not None and per.get(leave_out, 0) > 0:
            total -= 1
            same -= int(leave_out == predicted)
        if total <= 0:
            return 0.0, 0.0
        return math.log1p(total), same / total


# ------------------------------------------------------------------------ cost model


def fetch_outcomes(y: np.ndarray, url_proba: np.ndarray, fused_proba: np.ndarray
                   ) -> np.ndarray:
    """Index into ``OUTCOMES`` of each row's fetch: did the fused verdict keep, break or fix
    the URL verdict?"""
    url_ok = np.asarray(url_proba).argmax(axis=1) == np.asarray(y)
    fused_ok = np.asarray(fused_proba).argmax(axis=1) == np.asarray(y)
    return np.where(url_ok, np.where(fused_ok, 0, 1), np.where(fused_ok, 2, 3))


def _url_features(proba: np.ndarray, domain_feats: np.ndarray | None) -> np.ndarray:
    p = np.clip(np.asarray(proba, dtype=np.float64), _FLOOR, 1.0)
    k = p.shape[1]
    srt = np.sort(p, axis=1)
    top, second = srt[:, -1], srt[:, -2] if k > 1 else np.zeros(len(p))
    entropy = -(p * np.log(p)).sum(axis=1) / max(math.log(k), 1e-9)
    onehot = np.zeros_like(p)
    onehot[np.arange(len(p)), p.argmax(axis=1)] = 1.0
    cols = [top, top - second, entropy, np.log(top / np.clip(1 - top, _FLOOR, 1)),
            np.log(np.clip(1 - top, _FLOOR, 1)), onehot]
    if domain_feats is not None:
        cols.append(domain_feats)
    return np.column_stack(cols)


class CostModel:
    """How much a fetch of each URL is expected to improve its verdict, from URL features.

    A small multinomial logistic regression over the four fetch outcomes (``OUTCOMES``),
    fitted on held-out rows where both verdicts are known. ``costs`` are the taxonomy's
    per-category misclassification costs (``Taxonomy.costs()``); all ones when omitted.
    """

    def __init__(self, C: float = 1.0, use_domains: bool = True,
                 domain_dropout: float = 0.5, seed: int = 0) -> None:
        self.C = C
        self.use_domains = use_domains
        self.domain_dropout = domain_dropout
        self.seed = seed

    def get_params(self) -> dict[str, Any]:
        return {"C": self.C, "use_domains": self.use_domains,
                "domain_dropout": self.domain_dropout, "seed": self.seed}

    def __repr__(self) -> str:
        return "CostModel(" + ", ".join(f"{k}={v!r}" for k, v in self.get_params().items()) + ")"

    def _domain_features(self, proba: np.ndarray, domains: Sequence[str] | None,
                         history: DomainHistory | None, leave_out: np.ndarray | None = None,
                         dropout: float = 0.0) -> np.ndarray | None:
        if not self.use_domains:
            return None
        out = np.zeros((len(proba), 2))
        if domains is None or history is None:
            return out
        pred = np.asarray(proba).argmax(axis=1)
        rng = np.random.default_rng(self.seed)
        for i, d in enumerate(domains):
            if dropout and rng.random() < dropout:
                continue
            out[i] = history.features(str(d), int(pred[i]),
                                      None if leave_out is None else int(leave_out[i]))
        return out

    def fit(self, url_proba: np.ndarray, fused_proba: np.ndarray, y: np.ndarray,
            costs: np.ndarray | None = None, domains: Sequence[str] | None = None
            ) -> CostModel:
        """Learn the outcome chances from held-out rows (URL and fused probabilities, truth).

        With ``domains``, the store's knowledge of each row's domain is simulated from the
        other rows of the same domain (its fused verdicts), and hidden for a share
        ``domain_dropout`` of rows so the model also learns the first-visit case.
        """
        from sklearn.linear_model import LogisticRegression

        pu = np.asarray(url_proba, dtype=np.float64)
        pf = np.asarray(fused_proba, dtype=np.float64)
        y = np.asarray(y, dtype=np.int64)
        if pu.ndim != 2 or pf.shape != pu.shape or y.shape != (len(pu),):
            raise ValueError("url_proba and fused_proba must be (n, k) and y (n,)")
        if len(pu) < 10:
            raise ValueError(f"a cost model needs at least 10 held-out rows, got {len(pu)}")
        k = pu.shape[1]
        if k < 2 or not (np.isfinite(pu).all() and np.isfinite(pf).all()):
            raise ValueError("probabilities must be finite, over at least two classes")
        if y.min() < 0 or y.max() >= k:
            raise ValueError(f"y holds a class index outside 0..{k - 1}")
        cost_vec = np.ones(k) if costs is None else np.asarray(costs, dtype=np.float64)
        if cost_vec.shape != (k,) or not np.isfinite(cost_vec).all() or (cost_vec <= 0).any():
            raise ValueError(f"costs must be {k} finite positive numbers")
        outcome = fetch_outcomes(y, pu, pf)
        history = None
        if domains is not None:
            history = DomainHistory.from_rows(domains, pf.argmax(axis=1))
        X = _url_features(pu, self._domain_features(pu, domains, history,
                                                    leave_out=pf.argmax(axis=1),
                                                    dropout=self.domain_dropout))
        mean = X.mean(axis=0)
        scale = np.where(X.std(axis=0) > 1e-9, X.std(axis=0), 1.0)
        Xs = (X - mean) / scale
        present = np.unique(outcome)
        coef = np.zeros((len(OUTCOMES), X.shape[1]))
        intercept = np.full(len(OUTCOMES), -30.0)  # outcomes never seen stay ~0
        started = time.perf_counter()
        if present.size == 1:
            intercept[present[0]] = 0.0
        else:
            clf = LogisticRegression(C=self.C, max_iter=1000, random_state=self.seed)
            clf.fit(Xs, outcome)
            if present.size == 2:  # binary: sklearn keeps one row for the second class
                coef[present[1]] = clf.coef_[0]
                intercept[present[1]] = clf.intercept_[0]
                intercept[present[0]] = 0.0
            else:
                coef[present] = clf.coef_
                intercept[present] = clf.intercept_
        # learned state is assigned only once everything succeeded
        self.costs_, self.mean_, self.scale_ = cost_vec, mean, scale
        self.coef_, self.intercept_ = coef, intercept
        self.n_classes_ = k
        self.training_ = {"rows": int(len(pu)),
                          "outcome_shares": {OUTCOMES[i]: round(float((outcome == i).mean()), 4)
                                             for i in range(len(OUTCOMES))},
                          "seconds": round(time.perf_counter() - started, 3),
                          "method": "value of information: multinomial logistic regression "
                                    "over fetch outcomes from URL-model features"}
        return self

    def _check_fitted(self) -> None:
        if not hasattr(self, "coef_"):
            raise NotFittedError("this CostModel is not fitted yet: call fit() or load()")

    def outcome_proba(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None) -> np.ndarray:
        """(n, 4) chances of each fetch outcome, in ``OUTCOMES`` order."""
        self._check_fitted()
        pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
        if pu.shape[1] != self.n_classes_:
            raise ValueError(f"expected probabilities over {self.n_classes_} classes")
        X = _url_features(pu, self._domain_features(pu, domains, history))
        Z = ((X - self.mean_) / self.scale_) @ self.coef_.T + self.intercept_
        Z -= Z.max(axis=1, keepdims=True)
        E = np.exp(Z)
        return E / E.sum(axis=1, keepdims=True)

    def expected_gain(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None) -> dict[str, np.ndarray]:
        """Per URL: ``gain`` (expected cost saved by a successful fetch), ``p_wrong`` (URL
        verdict wrong), ``p_fix`` (a fetch fixes it, given it is wrong), ``p_break``."""
        pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
        P = self.outcome_proba(pu, domains, history)
        pred = pu.argmax(axis=1)
        gain = P[:, 2] * _cost_if_wrong(pu, self.costs_) - P[:, 1] * self.costs_[pred]
        p_wrong = P[:, 2] + P[:, 3]
        return {"gain": gain, "p_wrong": p_wrong,
                "p_fix": np.where(p_wrong > 0, P[:, 2] / np.maximum(p_wrong, _FLOOR), 0.0),
                "p_break": P[:, 1]}

    # ---------------------------------------------------------------------- files
    def save(self, path: str | Path, links: dict[str, str] | None = None) -> Path:
        self._check_fitted()
        meta = {"cascade_version": __version__,
                "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "params": self.get_params(), "n_classes": self.n_classes_,
                "outcomes": list(OUTCOMES), "links": links or {}, "training": self.training_}
        return save_model_dir(path, KIND, meta, {
            "coef": self.coef_, "intercept": self.intercept_, "mean": self.mean_,
            "scale": self.scale_, "costs": self.costs_})

    @classmethod
    def load(cls, path: str | Path) -> tuple[CostModel, dict[str, str]]:
        meta, arrays = load_model_dir(path, KIND)
        try:
            model = cls(**meta["params"])
            if list(meta["outcomes"]) != list(OUTCOMES):
                raise ModelFileError(f"{path}: cost model outcomes do not match this version")
            model.n_classes_ = int(meta["n_classes"])
            for name in ("coef", "intercept", "mean", "scale", "costs"):
                setattr(model, f"{name}_", arrays[name].astype(np.float64))
            k = model.n_classes_
            n_feat = 5 + k + (2 if model.use_domains else 0)
            if (model.coef_.shape != (len(OUTCOMES), n_feat)
                    or model.mean_.shape != (n_feat,) or model.scale_.shape != (n_feat,)
                    or model.intercept_.shape != (len(OUTCOMES),)
                    or model.costs_.shape != (k,)):
                raise ModelFileError(f"{path}: cost model arrays have the wrong shapes")
            model.training_ = meta.get("training", {})
            links = {str(a): str(b) for a, b in dict(meta.get("links", {})).items()}
        except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
            if isinstance(exc, ModelFileError):
                raise
            raise ModelFileError(f"{path}: model.json is missing or has a bad field: {exc}") \
                from None
        return model, links


def _cost_if_wrong(pu: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Expected cost of the true category given that the URL verdict is wrong."""
    pred = pu.argmax(axis=1)
    other = pu * c[None, :]
    other[np.arange(len(pu)), pred] = 0.0
    rest = pu.sum(axis=1) - pu[np.arange(len(pu)), pred]
    return np.where(rest > _FLOOR, other.sum(axis=1) / np.maximum(rest, _FLOOR), c.mean())


def confidence_gain(url_proba: np.ndarray, costs: np.ndarray) -> dict[str, np.ndarray]:
    """The no-cost-model estimate: every fetch fixes a wrong verdict and breaks nothing."""
    pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
    p_wrong = 1.0 - pu.max(axis=1)
    return {"gain": p_wrong * _cost_if_wrong(pu, np.asarray(costs, dtype=np.float64)),
            "p_wrong": p_wrong, "p_fix": np.ones(len(pu)), "p_break": np.zeros(len(pu))}


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
    cost_model: CostModel | None,
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

    Without a cost model (a URL-only model directory) the gain falls back to the calibrated
    chance that the URL verdict is wrong times the expected cost of that mistake, i.e.
    lowest-confidence-first weighted by cost (``costs``, per category; default all 1)
    and lookups. ``history`` (what the store knows of each domain) feeds the cost model's
    domain features; without it every URL is a first visit.
    """
    n = len(urls)
    pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64)) if n else np.zeros((0, 1))
    if len(pu) != n:
        raise ValueError("urls and url_proba must have the same length")
    w = np.ones(n) if counts is None else np.asarray(counts, dtype=np.float64)
    if w.shape != (n,) or (w < 0).any() or not np.isfinite(w).all():
        raise ValueError("counts must be one finite number >= 0 per URL")
    doms = list(domains) if domains is not None else [""] * n
    per_fetch = fetch_costs or FetchCosts()
    if n and cost_model is not None:
        est = cost_model.expected_gain(pu, doms if domains is not None else None, history)
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
            decided[i] = (False, None, "no-gain")
        elif taken >= count_limit:
            decided[i] = (False, None, "budget:count")
        elif budget.max_bytes is not None and spent_bytes + exp_bytes[i] > budget.max_bytes:
            decided[i] = (False, None, "budget:bytes")
        elif budget.max_seconds is not None and spent_secs + exp_secs[i] > budget.max_seconds:
            decided[i] = (False, None, "budget:seconds")
        else:
            taken += 1
            spent_bytes += exp_bytes[i]
            spent_secs += exp_secs[i]
            decided[i] = (True, taken, "selected")
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
