"""The fetch-value model: how much fetching a URL's page is expected to improve its verdict.

It learns, from rows where both the URL-only verdict and the fused verdict are known (the
stacking rows of training, ``ModelBundle.held_out``), the chance of each of four outcomes of a
fetch from URL-model features only: the URL verdict was right and stays right, was right and
the page breaks it, was wrong and the page fixes it, was wrong and stays wrong. The expected
gain of a fetch is then

    P(fix) x E[cost of the true category | URL verdict wrong] - P(break) x cost(URL verdict)

with the costs from the taxonomy (missing a high-risk category weighs more). The planner
(``cascade.budget.plan``) scales it by the chance that the fetch succeeds and by how often
the URL is looked up, and divides by the fetch's cost.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from sklearn.base import BaseEstimator

from cascade._validation import check_labels, check_proba
from cascade.errors import ModelFileError, NotFittedError
from cascade.models.model_files import ModelFileMixin
from cascade.models.params import Constraint, Interval, OneOf, check_params

__all__ = [
    "MIN_VALUE_ROWS",
    "OUTCOMES",
    "DomainHistory",
    "FetchValueModel",
    "confidence_gain",
    "fetch_outcomes",
]

#: Fewest held-out rows a fetch-value model is fitted on.
MIN_VALUE_ROWS = 10
#: The four outcomes of a fetch, as (URL verdict right?, fused verdict right?).
OUTCOMES = ("kept-right", "broke", "fixed", "kept-wrong")
_FLOOR = 1e-12


@dataclass(frozen=True)
class DomainHistory:
    """What the verdict store knows about a registered domain: how many of its URLs have a
    page-stage verdict, by category. Used as fetch-value-model features (a domain whose pages all
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


class FetchValueModel(ModelFileMixin, BaseEstimator):
    """How much a fetch of each URL is expected to improve its verdict, from URL features.

    A small multinomial logistic regression over the four fetch outcomes (``OUTCOMES``),
    fitted on held-out rows where both verdicts are known. ``costs`` are the taxonomy's
    per-category misclassification costs (``Taxonomy.costs()``); all ones when omitted.
    """

    _model_kind = "fetch-value-model"
    _version_prefix = "value"
    _param_rules: ClassVar[dict[str, Constraint]] = {
        "C": Interval(0, None, closed="neither"),
        "use_domains": OneOf((True, False)),
        "domain_dropout": Interval(0, 1),
        "seed": Interval(0, 2**63 - 1, integer=True),
    }

    def __init__(self, C: float = 1.0, use_domains: bool = True,
                 domain_dropout: float = 0.5, seed: int = 0) -> None:
        self.C = C
        self.use_domains = use_domains
        self.domain_dropout = domain_dropout
        self.seed = seed

    def _check_params(self) -> None:
        check_params(self, self._param_rules)

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
            ) -> FetchValueModel:
        """Learn the outcome chances from held-out rows (URL and fused probabilities, truth).

        With ``domains``, the store's knowledge of each row's domain is simulated from the
        other rows of the same domain (its fused verdicts), and hidden for a share
        ``domain_dropout`` of rows so the model also learns the first-visit case.
        """
        from sklearn.linear_model import LogisticRegression

        self._check_params()
        y = check_labels(y, "y")
        pu = check_proba(url_proba, len(y), "url_proba")
        k = pu.shape[1]
        pf = check_proba(fused_proba, len(y), "fused_proba", n_classes=k)
        if len(pu) < MIN_VALUE_ROWS:
            raise ValueError(f"a fetch-value model needs at least {MIN_VALUE_ROWS} held-out "
                             f"rows, got {len(pu)}")
        if k < 2:
            raise ValueError("probabilities must be over at least two classes")
        if y.max() >= k:
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
            raise NotFittedError("this FetchValueModel is not fitted yet: call fit() or load()")

    def outcome_proba(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None) -> np.ndarray:
        """(n, 4) chances of each fetch outcome, in ``OUTCOMES`` order."""
        self._check_fitted()
        pu = check_proba(np.atleast_2d(url_proba), None, "url_proba", n_classes=self.n_classes_)
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
    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        self._check_fitted()
        return ({"n_classes": self.n_classes_, "outcomes": list(OUTCOMES),
                 "training": self.training_},
                {"coef": self.coef_, "intercept": self.intercept_, "mean": self.mean_,
                 "scale": self.scale_, "costs": self.costs_})

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        if list(meta["outcomes"]) != list(OUTCOMES):
            raise ModelFileError(f"{where}: fetch-value outcomes do not match this version")
        self.n_classes_ = int(meta["n_classes"])
        for name in ("coef", "intercept", "mean", "scale", "costs"):
            setattr(self, f"{name}_", arrays[name].astype(np.float64))
        k = self.n_classes_
        n_feat = 5 + k + (2 if self.use_domains else 0)
        if (self.coef_.shape != (len(OUTCOMES), n_feat)
                or self.mean_.shape != (n_feat,) or self.scale_.shape != (n_feat,)
                or self.intercept_.shape != (len(OUTCOMES),)
                or self.costs_.shape != (k,)):
            raise ModelFileError(f"{where}: fetch-value model arrays have the wrong shapes")


def _cost_if_wrong(pu: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Expected cost of the true category given that the URL verdict is wrong."""
    pred = pu.argmax(axis=1)
    other = pu * c[None, :]
    other[np.arange(len(pu)), pred] = 0.0
    rest = pu.sum(axis=1) - pu[np.arange(len(pu)), pred]
    return np.where(rest > _FLOOR, other.sum(axis=1) / np.maximum(rest, _FLOOR), c.mean())


def confidence_gain(url_proba: np.ndarray, costs: np.ndarray) -> dict[str, np.ndarray]:
    """The estimate without a fetch-value model: every fetch fixes a wrong verdict and
    breaks nothing."""
    pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
    p_wrong = 1.0 - pu.max(axis=1)
    return {"gain": p_wrong * _cost_if_wrong(pu, np.asarray(costs, dtype=np.float64)),
            "p_wrong": p_wrong, "p_fix": np.ones(len(pu)), "p_break": np.zeros(len(pu))}


