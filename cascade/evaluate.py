"""Honest evaluation splits and a one-call evaluation of a URL model.

A URL model evaluated on URLs it trained on, or on other pages of domains it trained on,
looks better than it will be on tomorrow's long tail. So the split is by time when times
are known (train before T, test after), never puts one normalized URL on both sides, and
can keep every registered domain on one side only.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from cascade.metrics import summarize
from cascade.urls import UrlKey

__all__ = ["Split", "evaluate_proba", "evaluation_split", "per_class_change", "risk_breakdown"]


@dataclass(frozen=True)
class Split:
    """Row indices of each side, and how the split was made."""

    train: np.ndarray
    test: np.ndarray
    method: str
    cut: str | None = None  # the time T for a time split
    dropped: int = 0  # test rows dropped because their URL (or domain) is in train

    def describe(self) -> dict[str, Any]:
        return {"method": self.method, "cut": self.cut, "train_rows": int(len(self.train)),
                "test_rows": int(len(self.test)), "dropped_from_test": self.dropped}


def _group(key: UrlKey) -> str:
    return key.registered_domain or key.host


def _unit_hash(text: str, seed: int) -> float:
    digest = hashlib.blake2b(f"{seed}\x00{text}".encode("utf-8", "surrogatepass"),
                             digest_size=8).digest()
    return int.from_bytes(digest, "big") / 2**64


def evaluation_split(
    keys: Sequence[UrlKey],
    seen_at: Sequence[str | None] | None = None,
    test_fraction: float = 0.2,
    group_by_domain: bool = True,
    seed: int = 0,
) -> Split:
    """Split rows for evaluation.

    With timestamps (ISO 8601 strings, compared as text), rows seen at or after the
    ``1 - test_fraction`` quantile T are the test side; with ``group_by_domain`` a domain
    belongs to the test side only if it was first seen at or after T. Without timestamps,
    whole registered domains (or URLs, if not grouping) are assigned by a seeded hash.
    Either way no normalized URL is on both sides.
    """
    if not 0 < test_fraction < 1:
        raise ValueError(f"test_fraction must be between 0 and 1, got {test_fraction}")
    n = len(keys)
    urls = [k.url for k in keys]
    has_time = seen_at is not None and sum(1 for t in seen_at if t) >= max(10, n // 2)
    if has_time:
        times = [t or "" for t in seen_at]  # type: ignore[union-attr]
        ordered = sorted(t for t in times if t)
        cut = ordered[min(len(ordered) - 1, int(len(ordered) * (1 - test_fraction)))]
        if group_by_domain:
            first: dict[str, str] = {}
            for k, t in zip(keys, times, strict=True):
                g = _group(k)
                if t and (g not in first or t < first[g]):
                    first[g] = t
            is_test = np.array([first.get(_group(k), "") >= cut for k in keys])
            method = "time+domain"
        else:
            is_test = np.array([t >= cut for t in times])
            method = "time"
    else:
        cut = None
        if group_by_domain:
            is_test = np.array([_unit_hash(_group(k), seed) < test_fraction for k in keys])
            method = "domain-hash"
        else:
            is_test = np.array([_unit_hash(u, seed) < test_fraction for u in urls])
            method = "url-hash"
    train_urls = {u for u, t in zip(urls, is_test, strict=True) if not t}
    leak = np.array([t and u in train_urls for u, t in zip(urls, is_test, strict=True)],
                    dtype=bool)
    test = np.flatnonzero(is_test & ~leak)
    train = np.flatnonzero(~is_test)
    return Split(train=train, test=test, method=method, cut=cut, dropped=int(leak.sum()))


def evaluate_proba(
    proba: np.ndarray,
    labels: Sequence[str],
    classes: Sequence[str],
    counts: Sequence[int] | None = None,
    precision_target: float = 0.95,
    risk: Mapping[str, str] | None = None,
) -> dict[str, Any]:
    """All headline metrics (plain and weighted by lookup count) as a JSON-ready dict.

    With ``risk`` (category -> the taxonomy's risk level), a ``by_risk`` section says how
    often a high-risk page was put in a low-risk category (under-blocking: a policy that
    blocks the high-risk categories lets it through) and the reverse (over-blocking)."""
    index = {c: i for i, c in enumerate(classes)}
    unknown = sorted({lab for lab in labels if lab not in index})
    if unknown:
        raise ValueError(f"labels not among the model's classes: {unknown[:10]}")
    y = np.array([index[lab] for lab in labels], dtype=np.int64)
    weight = None if counts is None else np.asarray(counts, dtype=np.float64)
    out = summarize(y, proba, list(classes), sample_weight=weight,
                    precision_target=precision_target)
    if risk is not None:
        out["by_risk"] = risk_breakdown(y, np.asarray(proba).argmax(axis=1), list(classes),
                                        risk)
    return out


def risk_breakdown(y: np.ndarray, pred: np.ndarray, classes: Sequence[str],
                   risk: Mapping[str, str]) -> dict[str, Any]:
    """Accuracy per risk level, and the two ways a category error crosses the line between
    high- and low-risk categories (counts and shares of the rows on the true side)."""
    high = np.array([risk.get(c, "low") == "high" for c in classes])
    true_high, pred_high = high[y], high[pred]
    levels: dict[str, Any] = {}
    for level in sorted({risk.get(c, "low") for c in classes}):
        rows = np.array([risk.get(classes[i], "low") == level for i in y])
        levels[level] = {"rows": int(rows.sum()),
                         "accuracy": float((pred[rows] == y[rows]).mean()) if rows.any()
                         else None}
    n_high, n_low = int(true_high.sum()), int((~true_high).sum())
    under = int((true_high & ~pred_high).sum())
    over = int((~true_high & pred_high).sum())
    return {
        "high_risk_categories": [c for c, h in zip(classes, high, strict=True) if h],
        "levels": levels,
        "under_blocking": {"rows": under, "share_of_high_risk_rows":
                           under / n_high if n_high else None,
                           "means": "a high-risk row put in a low-risk category"},
        "over_blocking": {"rows": over, "share_of_low_risk_rows":
                          over / n_low if n_low else None,
                          "means": "a low-risk row put in a high-risk category"},
    }


def per_class_change(before: dict[str, Any], after: dict[str, Any],
                     worse_by: float = 0.02) -> dict[str, Any]:
    """F1 per category from one set of metrics to another (URL model alone -> fused), and
    the categories that got worse by more than ``worse_by``: fusion raises the average and
    can still hurt single categories."""
    rows = {}
    worse = []
    for name, b in before["per_class"].items():
        a = after["per_class"][name]
        if b["f1"] is None or a["f1"] is None:
            rows[name] = {"f1_before": b["f1"], "f1_after": a["f1"], "change": None}
            continue
        change = a["f1"] - b["f1"]
        rows[name] = {"f1_before": b["f1"], "f1_after": a["f1"], "change": change}
        if change < -worse_by:
            worse.append(name)
    return {"per_class": rows, "worse": worse, "worse_by_more_than": worse_by}
