"""The fetch-value model: how much fetching a URL's page is expected to improve its verdict.

It learns, from rows where both the URL-only verdict and the fused verdict are known (the
stacking rows of training, ``ModelBundle.held_out``), the chance of each of four outcomes of a
fetch: the URL verdict was right and stays right, was right and the page breaks it, was wrong
and the page fixes it, was wrong and stays wrong. The expected gain of a fetch is then

    P(fix) x E[cost of the true category | URL verdict wrong] - P(break) x cost(URL verdict)

with the costs from the taxonomy (missing a high-risk category weighs more). The planner
(``cascade.budget.plan``) scales it by the chance that the fetch succeeds and by how often
the URL is looked up, and divides by the fetch's cost.

What it reads of a URL (``FetchValueModel`` documents the choices and how they were made):

- the URL model's confidence (top probability, margin, entropy, log-odds);
- how often a page overturns, fixes and breaks URL verdicts of the predicted category,
  learned out of fold inside the stacking rows and shrunk towards the overall rate
  (``oof_class_rates``), so a row's own outcome never feeds its own feature;
- optionally the URL's shape (``url_shape_features``: path depth, file-like tail, ``~user``
  directory, query, IP-literal host, a host under a hosting suffix, ...);
- what the verdict store knows of the domain (``DomainHistory``), in a second model used
  only for URLs whose domain the store has seen, so first visits are ranked by a model
  that never learned to lean on a history they do not have.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
from sklearn.base import BaseEstimator

from cascade._validation import check_labels, check_proba
from cascade.errors import ModelFileError, NotFittedError
from cascade.models.model_files import ModelFileMixin, load_model_dir
from cascade.models.params import Constraint, Interval, OneOf, check_params
from cascade.urls import UrlKey, normalize

__all__ = [
    "CLASS_RATES",
    "MIN_VALUE_ROWS",
    "OUTCOMES",
    "URL_SHAPE_FEATURES",
    "VALUE_FORMAT",
    "DomainHistory",
    "FetchValueModel",
    "confidence_gain",
    "fetch_outcomes",
    "oof_class_rates",
    "url_shape_features",
]

#: Fewest held-out rows a fetch-value model is fitted on.
MIN_VALUE_ROWS = 10
#: The four outcomes of a fetch, as (URL verdict right?, fused verdict right?).
OUTCOMES = ("kept-right", "broke", "fixed", "kept-wrong")
#: Version of the fetch-value model's own file layout (inside the shared model-file format):
#: 1 = confidence + one-hot class + domain features in one model (cascade <= 0.2);
#: 2 = confidence + out-of-fold class rates (+ URL shape), a separate domain-history model.
VALUE_FORMAT = 2
#: Per-category rates the model can read, each the share of stacking rows with that
#: URL-predicted category where: the fused verdict differs from the URL verdict
#: ("overturn"), the fetch fixed / broke the URL verdict, the fused / page-only / URL verdict
#: was right (the page's and the URL model's reliability on that category).
CLASS_RATES = ("overturn", "fixed", "broke", "fused-right", "page-right", "url-right")
#: Names of the columns of ``url_shape_features``, in order.
URL_SHAPE_FEATURES = ("path_depth", "directory", "file_tail", "markup_tail", "document_tail",
                      "user_directory", "below_user_directory", "query", "ip_literal",
                      "non_default_port", "subdomain_depth", "hosted_suffix",
                      "tail_repeats_directory", "log_length")
_FLOOR = 1e-12
_RATE_CLIP = 1e-3
_N_CONFIDENCE = 5
_N_DOMAIN = 2
# Tails served as HTML pages (file-name extensions, common practice; no standard maps them).
_MARKUP_TAILS = frozenset({"html", "htm", "shtml", "xhtml"})


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


# ----------------------------------------------------------------------------- URL shape
@lru_cache(maxsize=1)
def _icann_suffixes() -> Any:
    """The Public Suffix List without its PRIVATE section (the list the URL keys use has
    both; the private section is where hosting providers list the suffixes under which
    their users get names)."""
    from publicsuffixlist import PublicSuffixList

    return PublicSuffixList(only_icann=True)


def _shape_row(key: UrlKey) -> list[float]:
    segments = [s for s in key.path.split("/") if s]
    directory = key.path.endswith("/")
    tail = "" if directory or not segments else segments[-1]
    stem, dot, extension = tail.rpartition(".")
    extension = extension.lower() if dot and stem else ""
    # RFC 3986 section 2.3: "~" is unreserved, and normalization (section 6.2.2.2) decodes
    # "%7E" to it, so one test covers both spellings. The "~user" home directory itself is
    # a web-server convention (common practice, no source).
    users = [i for i, s in enumerate(segments) if s.startswith("~")]
    below_user = len(segments) - 1 - users[0] if users else 0
    if tail and not directory:
        below_user -= 1  # the file itself is not a directory level
    parent = segments[-2].lstrip("~").lower() if len(segments) >= 2 else ""
    registered = key.registered_domain or key.host
    subdomains = 0 if key.is_ip else max(key.host.count(".") - registered.count("."), 0)
    hosted = 0.0
    if not key.is_ip and key.public_suffix:
        # Public Suffix List: a suffix listed in the PRIVATE section (so absent from the
        # ICANN-only list) is one under which a provider hands out names to its users.
        hosted = float(key.public_suffix != _icann_suffixes().publicsuffix(key.host))
    return [
        float(min(len(segments), 8)),
        float(directory),
        float(bool(extension)),
        float(extension in _MARKUP_TAILS),
        float(bool(extension) and extension not in _MARKUP_TAILS),
        float(bool(users)),
        float(max(below_user, 0)),
        float(bool(key.query)),
        float(key.is_ip),
        # RFC 3986 section 6.2.3: a scheme's default port is dropped by normalization, so
        # any port left on the key is a non-default one.
        float(key.port is not None),
        float(min(subdomains, 4)),
        hosted,
        float(bool(stem) and bool(parent) and stem.lower() == parent),
        math.log(len(key.url)),
    ]


def url_shape_features(urls: Sequence[str | UrlKey]) -> np.ndarray:
    """(n, len(URL_SHAPE_FEATURES)) numbers describing each URL's shape, not its words.

    ``urls`` are ``UrlKey`` or text (normalized here; ``InvalidURL`` if one is not a URL).
    The host is an IP literal when ``UrlKey.is_ip`` says so (WHATWG URL Standard host
    parsing, which also reads IPv4 numbers such as ``0xc0000207``)."""
    keys = [u if isinstance(u, UrlKey) else normalize(str(u)) for u in urls]
    if not keys:
        return np.zeros((0, len(URL_SHAPE_FEATURES)))
    return np.array([_shape_row(k) for k in keys], dtype=np.float64)


# ------------------------------------------------------------------ per-category rates
def class_rate_events(y: np.ndarray, url_proba: np.ndarray, fused_proba: np.ndarray,
                      page_proba: np.ndarray | None = None) -> np.ndarray:
    """(n, len(CLASS_RATES)) 0/1 events of each stacking row, in ``CLASS_RATES`` order
    ("page-right" is the fused verdict's when no page probabilities are given)."""
    url_pred = np.asarray(url_proba).argmax(axis=1)
    fused_pred = np.asarray(fused_proba).argmax(axis=1)
    page_pred = fused_pred if page_proba is None else np.asarray(page_proba).argmax(axis=1)
    outcome = fetch_outcomes(y, url_proba, fused_proba)
    return np.column_stack([fused_pred != url_pred, outcome == 2, outcome == 1,
                            fused_pred == y, page_pred == y, url_pred == y]).astype(np.float64)


def _rate_table(predicted: np.ndarray, events: np.ndarray, n_classes: int, prior: float,
                overall: np.ndarray) -> np.ndarray:
    """Per category, (events + prior x overall rate) / (rows + prior): empirical Bayes."""
    sums = np.zeros((n_classes, events.shape[1]))
    np.add.at(sums, predicted, events)
    rows = np.bincount(predicted, minlength=n_classes).astype(np.float64)
    return (sums + prior * overall[None, :]) / (rows[:, None] + prior)


def oof_class_rates(predicted: np.ndarray, events: np.ndarray, n_classes: int,
                    prior: float = 20.0, folds: int = 10, seed: int = 0
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Per row, the shrunk rates of its predicted category learned from the OTHER folds
    (``(n, m)``), and the table learned from all rows (``(n_classes, m)``) for new URLs.

    Folds are a seeded random split of the rows (leave-one-out when there are fewer rows
    than folds); a row's own events never enter its own rates. Each fold's rates are shrunk
    towards the overall rate of the rows outside the fold with ``prior`` pseudo-rows.
    Folds are not by domain on purpose: with a few large sites, a site's own rate is then
    missing from every one of its rows, which makes the feature anti-correlated with the
    outcome (measured worse on WebKB, docs/budget.md)."""
    predicted = np.asarray(predicted, dtype=np.int64)
    events = np.asarray(events, dtype=np.float64)
    n = len(predicted)
    k = max(int(folds), 2)
    fold = np.random.default_rng(seed).permutation(n) % min(k, max(n, 1))
    oof = np.zeros((n, events.shape[1]))
    for f in np.unique(fold):
        inside = fold == f
        rest = ~inside
        if not rest.any():  # one row in all: nothing else to learn from, use no evidence
            oof[inside] = 0.5
            continue
        table = _rate_table(predicted[rest], events[rest], n_classes, prior,
                            events[rest].mean(axis=0))
        oof[inside] = table[predicted[inside]]
    return oof, _rate_table(predicted, events, n_classes, prior, events.mean(axis=0))


def _logit(rate: np.ndarray) -> np.ndarray:
    r = np.clip(rate, _RATE_CLIP, 1 - _RATE_CLIP)
    return np.log(r / (1 - r))


def _confidence_features(proba: np.ndarray) -> np.ndarray:
    p = np.clip(np.asarray(proba, dtype=np.float64), _FLOOR, 1.0)
    k = p.shape[1]
    srt = np.sort(p, axis=1)
    top = srt[:, -1]
    second = srt[:, -2] if k > 1 else np.zeros(len(p))
    entropy = -(p * np.log(p)).sum(axis=1) / max(math.log(k), 1e-9)
    return np.column_stack([top, top - second, entropy,
                            np.log(top / np.clip(1 - top, _FLOOR, 1)),
                            np.log(np.clip(1 - top, _FLOOR, 1))])


def _fit_softmax(X: np.ndarray, outcome: np.ndarray, C: float, seed: int
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Standardize, then a multinomial logistic regression over the four outcomes: (mean,
    scale, coef (4, d), intercept (4,)); outcomes never seen keep a very low intercept."""
    from sklearn.linear_model import LogisticRegression

    mean = X.mean(axis=0)
    std = X.std(axis=0)
    scale = np.where(std > 1e-9, std, 1.0)
    Xs = (X - mean) / scale
    present = np.unique(outcome)
    coef = np.zeros((len(OUTCOMES), X.shape[1]))
    intercept = np.full(len(OUTCOMES), -30.0)  # outcomes never seen stay ~0
    if present.size == 1:
        intercept[present[0]] = 0.0
    else:
        clf = LogisticRegression(C=C, max_iter=1000, random_state=seed)
        clf.fit(Xs, outcome)
        if present.size == 2:  # binary: sklearn keeps one row for the second class
            coef[present[1]] = clf.coef_[0]
            intercept[present[1]] = clf.intercept_[0]
            intercept[present[0]] = 0.0
        else:
            coef[present] = clf.coef_
            intercept[present] = clf.intercept_
    return mean, scale, coef, intercept


def _softmax_rows(X: np.ndarray, mean: np.ndarray, scale: np.ndarray, coef: np.ndarray,
                  intercept: np.ndarray) -> np.ndarray:
    Z = ((X - mean) / scale) @ coef.T + intercept
    Z -= Z.max(axis=1, keepdims=True)
    E = np.exp(Z)
    return E / E.sum(axis=1, keepdims=True)


def _check_rates(value: Any) -> bool:
    return isinstance(value, tuple) and len(set(value)) == len(value) and \
        all(isinstance(v, str) and v in CLASS_RATES for v in value)


class FetchValueModel(ModelFileMixin, BaseEstimator):
    """How much a fetch of each URL is expected to improve its verdict.

    A multinomial logistic regression over the four fetch outcomes (``OUTCOMES``), fitted
    on held-out (stacking) rows where both verdicts are known, from: the URL model's
    confidence; the out-of-fold, shrunk rates ``class_rates`` of the predicted category
    (``oof_class_rates``; ``class_prior`` pseudo-rows, ``rate_folds`` folds); with
    ``class_onehot`` the predicted category itself; with ``url_shape`` the URL's shape
    (``url_shape_features``). With ``use_domains`` and domains at fit, a second model adds
    the store's knowledge of the domain (``DomainHistory``) and scores only URLs whose
    domain the store knows. ``costs`` are the taxonomy's per-category misclassification
    costs (``Taxonomy.costs()``); all ones when omitted.

    Defaults were chosen by leave-one-university-out cross-validation inside the WebKB
    stacking rows (never on a held-out university; docs/budget.md): strong regularization
    (``C=0.01``), the overturn/fix/break rates in place of the one-hot category, and no URL
    shape (it helped within a site and hurt on a new one).
    """

    _model_kind = "fetch-value-model"
    _version_prefix = "value"
    _param_rules: ClassVar[dict[str, Constraint]] = {
        "C": Interval(0, None, closed="neither"),
        "class_rates": OneOf(test=_check_rates,
                             text=f"a tuple of distinct names from {CLASS_RATES}"),
        "class_prior": Interval(0, None),
        "rate_folds": Interval(2, None, integer=True),
        "class_onehot": OneOf((True, False)),
        "url_shape": OneOf((True, False)),
        "use_domains": OneOf((True, False)),
        "seed": Interval(0, 2**63 - 1, integer=True),
    }

    def __init__(self, C: float = 0.01,
                 class_rates: tuple[str, ...] = ("overturn", "fixed", "broke"),
                 class_prior: float = 20.0, rate_folds: int = 10, class_onehot: bool = False,
                 url_shape: bool = False, use_domains: bool = True, seed: int = 0) -> None:
        self.C = C
        self.class_rates = class_rates
        self.class_prior = class_prior
        self.rate_folds = rate_folds
        self.class_onehot = class_onehot
        self.url_shape = url_shape
        self.use_domains = use_domains
        self.seed = seed

    def _check_params(self) -> None:
        check_params(self, self._param_rules)

    # ------------------------------------------------------------------ features
    def _n_features(self, n_classes: int) -> int:
        return (_N_CONFIDENCE + len(self.class_rates) + (n_classes if self.class_onehot else 0)
                + (len(URL_SHAPE_FEATURES) if self.url_shape else 0))

    def _features(self, pu: np.ndarray, rates: np.ndarray, urls: Sequence[str | UrlKey] | None
                  ) -> np.ndarray:
        """Columns: confidence, logit of each chosen class rate, [one-hot], [URL shape]."""
        cols = [_confidence_features(pu)]
        if self.class_rates:
            cols.append(_logit(rates))
        if self.class_onehot:
            onehot = np.zeros_like(pu)
            onehot[np.arange(len(pu)), pu.argmax(axis=1)] = 1.0
            cols.append(onehot)
        if self.url_shape:
            if urls is None:
                raise ValueError("this fetch-value model reads the URLs' shape "
                                 "(url_shape=True): pass urls")
            if len(urls) != len(pu):
                raise ValueError(f"{len(pu)} rows of url_proba but {len(urls)} URLs")
            cols.append(url_shape_features(urls))
        return np.column_stack(cols)

    def _rate_columns(self) -> list[int]:
        return [CLASS_RATES.index(r) for r in self.class_rates]

    def fit(self, url_proba: np.ndarray, fused_proba: np.ndarray, y: np.ndarray,
            costs: np.ndarray | None = None, domains: Sequence[str] | None = None,
            urls: Sequence[str | UrlKey] | None = None, page_proba: np.ndarray | None = None
            ) -> FetchValueModel:
        """Learn the outcome chances from held-out rows (URL and fused probabilities, truth).

        ``urls`` are needed with ``url_shape``; ``page_proba`` (the page model's own
        probabilities) for the "page-right" rate. With ``domains``, the store's knowledge of
        each row's domain is simulated from the other rows of the same domain (their fused
        verdicts) to fit the domain-history model.
        """
        self._check_params()
        y = check_labels(y, "y")
        pu = check_proba(url_proba, len(y), "url_proba")
        k = pu.shape[1]
        pf = check_proba(fused_proba, len(y), "fused_proba", n_classes=k)
        pp = None if page_proba is None else check_proba(page_proba, len(y), "page_proba",
                                                         n_classes=k)
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
        if "page-right" in self.class_rates and pp is None:
            raise ValueError("class rate 'page-right' needs page_proba")
        if domains is not None and len(domains) != len(y):
            raise ValueError(f"{len(y)} rows but {len(domains)} domains")
        started = time.perf_counter()
        outcome = fetch_outcomes(y, pu, pf)
        events = class_rate_events(y, pu, pf, pp)[:, self._rate_columns()]
        oof, table = oof_class_rates(pu.argmax(axis=1), events, k, self.class_prior,
                                     self.rate_folds, self.seed)
        X = self._features(pu, oof, urls)
        first_visit = _fit_softmax(X, outcome, self.C, self.seed)
        domain_model = None
        known = 0
        if self.use_domains and domains is not None:
            fused_pred = pf.argmax(axis=1)
            history = DomainHistory.from_rows(domains, fused_pred)
            D = self._domain_features(pu, domains, history, leave_out=fused_pred)
            has = D[:, 0] > 0
            known = int(has.sum())
            if known >= MIN_VALUE_ROWS:
                domain_model = _fit_softmax(np.column_stack([X, D])[has], outcome[has],
                                            self.C, self.seed)
        # learned state is assigned only once everything succeeded
        self.costs_ = cost_vec
        self.mean_, self.scale_, self.coef_, self.intercept_ = first_visit
        self.class_rate_table_ = table
        self.domain_model_ = domain_model
        self.n_classes_ = k
        self.training_ = {
            "rows": int(len(pu)),
            "rows_with_domain_history": known,
            "outcome_shares": {OUTCOMES[i]: round(float((outcome == i).mean()), 4)
                               for i in range(len(OUTCOMES))},
            "features": self.feature_names(),
            "seconds": round(time.perf_counter() - started, 3),
            "method": "value of information: multinomial logistic regression over fetch "
                      "outcomes from URL-model confidence and out-of-fold per-category rates"
                      + (", URL shape" if self.url_shape else "")}
        return self

    def feature_names(self) -> list[str]:
        """Names of the first-visit model's columns (the domain model adds two)."""
        names = ["top", "margin", "entropy", "log_odds_top", "log_not_top"]
        names += [f"rate:{r}" for r in self.class_rates]
        if self.class_onehot:
            k = getattr(self, "n_classes_", 0)
            names += [f"class:{j}" for j in range(k)]
        if self.url_shape:
            names += [f"shape:{s}" for s in URL_SHAPE_FEATURES]
        return names

    def _domain_features(self, proba: np.ndarray, domains: Sequence[str],
                         history: DomainHistory, leave_out: np.ndarray | None = None
                         ) -> np.ndarray:
        pred = np.asarray(proba).argmax(axis=1)
        out = np.zeros((len(proba), _N_DOMAIN))
        for i, d in enumerate(domains):
            out[i] = history.features(str(d), int(pred[i]),
                                      None if leave_out is None else int(leave_out[i]))
        return out

    def _check_fitted(self) -> None:
        if not hasattr(self, "coef_"):
            raise NotFittedError("this FetchValueModel is not fitted yet: call fit() or load()")

    def outcome_proba(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None,
                      urls: Sequence[str | UrlKey] | None = None) -> np.ndarray:
        """(n, 4) chances of each fetch outcome, in ``OUTCOMES`` order. ``urls`` are needed
        when the model reads URL shape; URLs whose domain ``history`` knows are scored by
        the domain-history model when there is one."""
        self._check_fitted()
        pu = check_proba(np.atleast_2d(url_proba), None, "url_proba", n_classes=self.n_classes_)
        X = self._features(pu, self.class_rate_table_[pu.argmax(axis=1)], urls)
        P = _softmax_rows(X, self.mean_, self.scale_, self.coef_, self.intercept_)
        if self.domain_model_ is not None and domains is not None and history is not None:
            if len(domains) != len(pu):
                raise ValueError(f"{len(pu)} rows of url_proba but {len(domains)} domains")
            D = self._domain_features(pu, domains, history)
            has = D[:, 0] > 0
            if has.any():
                P[has] = _softmax_rows(np.column_stack([X, D])[has], *self.domain_model_)
        return P

    def expected_gain(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None,
                      urls: Sequence[str | UrlKey] | None = None) -> dict[str, np.ndarray]:
        """Per URL: ``gain`` (expected cost saved by a successful fetch), ``p_wrong`` (URL
        verdict wrong), ``p_fix`` (a fetch fixes it, given it is wrong), ``p_break``."""
        pu = np.atleast_2d(np.asarray(url_proba, dtype=np.float64))
        P = self.outcome_proba(pu, domains, history, urls)
        pred = pu.argmax(axis=1)
        gain = P[:, 2] * _cost_if_wrong(pu, self.costs_) - P[:, 1] * self.costs_[pred]
        p_wrong = P[:, 2] + P[:, 3]
        return {"gain": gain, "p_wrong": p_wrong,
                "p_fix": np.where(p_wrong > 0, P[:, 2] / np.maximum(p_wrong, _FLOOR), 0.0),
                "p_break": P[:, 1]}

    # ---------------------------------------------------------------------- files
    @classmethod
    def load(cls, path: str | Path) -> FetchValueModel:
        """Read a fetch-value model directory; one of an earlier layout is refused."""
        meta, _arrays = load_model_dir(path, cls._model_kind)  # digests checked here
        found = meta.get("value_format", 1)
        if found != VALUE_FORMAT:
            raise ModelFileError(
                f"{path}: fetch-value model format {found!r}, this cascade reads format "
                f"{VALUE_FORMAT} (out-of-fold category rates, separate domain-history "
                "model). Retrain the bundle with 'cascade train'.")
        return super().load(path)

    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        self._check_fitted()
        arrays = {"coef": self.coef_, "intercept": self.intercept_, "mean": self.mean_,
                  "scale": self.scale_, "costs": self.costs_,
                  "class_rate_table": self.class_rate_table_}
        if self.domain_model_ is not None:
            for name, value in zip(("mean", "scale", "coef", "intercept"), self.domain_model_,
                                   strict=True):
                arrays[f"domain_{name}"] = value
        return ({"value_format": VALUE_FORMAT, "n_classes": self.n_classes_,
                 "outcomes": list(OUTCOMES), "features": self.feature_names(),
                 "domain_model": self.domain_model_ is not None, "training": self.training_},
                arrays)

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        if list(meta["outcomes"]) != list(OUTCOMES):
            raise ModelFileError(f"{where}: fetch-value outcomes do not match this version")
        k = int(meta["n_classes"])
        self.n_classes_ = k
        for name in ("coef", "intercept", "mean", "scale", "costs", "class_rate_table"):
            setattr(self, f"{name}_", arrays[name].astype(np.float64))
        n_feat = self._n_features(k)
        shapes_ok = (self.coef_.shape == (len(OUTCOMES), n_feat)
                     and self.mean_.shape == (n_feat,) and self.scale_.shape == (n_feat,)
                     and self.intercept_.shape == (len(OUTCOMES),)
                     and self.costs_.shape == (k,)
                     and self.class_rate_table_.shape == (k, len(self.class_rates)))
        self.domain_model_ = None
        if meta.get("domain_model"):
            dm = tuple(arrays[f"domain_{n}"].astype(np.float64)
                       for n in ("mean", "scale", "coef", "intercept"))
            d = n_feat + _N_DOMAIN
            shapes_ok = shapes_ok and dm[0].shape == (d,) and dm[1].shape == (d,) and \
                dm[2].shape == (len(OUTCOMES), d) and dm[3].shape == (len(OUTCOMES),)
            self.domain_model_ = dm
        if not shapes_ok:
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


