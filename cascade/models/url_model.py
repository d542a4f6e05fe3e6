"""The URL model: hashed character n-grams and tagged tokens, a multinomial linear model,
and temperature scaling, so its probabilities can be read as probabilities.

It reads only the URL string, so it is cheap enough for the request path; the cascade uses
its confidence to decide which URLs are worth a page fetch.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

from cascade import __version__
from cascade.errors import InvalidURL, ModelFileError, NotFittedError, TaxonomyError
from cascade.models.calibration import fit_temperature, softmax
from cascade.models.folds import group_folds
from cascade.models.hashing import (
    char_ngram_hashes,
    char_ngram_hashes_one,
    columns,
    token_hashes,
)
from cascade.models.linear import compact_table, pack_rows, unpack_rows
from cascade.models.model_files import data_digest, load_model_dir, save_model_dir
from cascade.models.softmax import fit_softmax
from cascade.taxonomy import Taxonomy
from cascade.urls import UrlKey, normalize

KIND = "url-model"
_ABSENT_CLASS_BIAS = -30.0  # a class with no training rows: never predicted, probability ~0


@dataclass(frozen=True)
class Contribution:
    """One feature's exact share of a class logit (after temperature)."""

    feature: str  # the substring or token, e.g. "odds" or "path:casino"
    kind: str  # "chars" or "token"
    value: float  # contribution to the class logit


@dataclass(frozen=True)
class ClassExplanation:
    category: str
    probability: float
    logit: float
    bias: float
    contributions: tuple[Contribution, ...]


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
                }
                for c, r in zip(self.classes, self.rest, strict=True)
            ],
        }


def as_keys(urls: Iterable[str | UrlKey]) -> list[UrlKey]:
    """Normalize each URL (``UrlKey`` passes through); raises ``InvalidURL`` on the first bad."""
    out = []
    for i, u in enumerate(urls):
        if isinstance(u, UrlKey):
            out.append(u)
        else:
            try:
                out.append(normalize(u))
            except InvalidURL as exc:
                raise InvalidURL(exc.text, f"{exc.reason} (item {i})") from None
    return out


class UrlModel:
    """Calibrated multinomial linear model over hashed URL features.

    Parameters
    ----------
    ngram_range : smallest and largest character n-gram, in UTF-8 bytes.
    n_features : hashing space (a power of two); memory is ``n_features * n_classes * 4`` bytes.
    use_tokens : also hash position-tagged words (host label, registered domain, path, query).
    C : inverse L2 regularization strength of the logistic regression.
    max_iter : L-BFGS iterations.
    min_count : a hashed column seen in fewer training rows gets no weight.
    class_balance : weight each training row by ``(1 / class frequency) ** class_balance``
        (0: no weighting). Raises macro-F1 on skewed data at some cost in accuracy and
        calibration; the temperature is still fitted, on unweighted out-of-fold rows.
    calibration_folds : the temperature is fitted on out-of-fold logits from this many fits,
        each leaving out a share of the registered domains (so it is measured on domains
        the model has not seen, as in use); the final weights are fitted on all rows.
        Below 2: no calibration (temperature 1).
    seed : fixes the hash salt and the calibration split; recorded in the model file.
    """

    def __init__(
        self,
        ngram_range: tuple[int, int] = (1, 4),
        n_features: int = 2**20,
        use_tokens: bool = True,
        C: float = 20.0,
        max_iter: int = 150,
        min_count: int = 2,
        class_balance: float = 0.0,
        calibration_folds: int = 3,
        seed: int = 0,
    ) -> None:
        self.ngram_range = ngram_range
        self.n_features = n_features
        self.use_tokens = use_tokens
        self.C = C
        self.max_iter = max_iter
        self.min_count = min_count
        self.class_balance = class_balance
        self.calibration_folds = calibration_folds
        self.seed = seed

    # ------------------------------------------------------------------ features
    def _check_params(self) -> None:
        lo, hi = self.ngram_range
        if not (1 <= lo <= hi <= 12):
            raise ValueError(
                f"ngram_range must satisfy 1 <= min <= max <= 12, got {self.ngram_range}"
            )
        n = self.n_features
        if n < 16 or n & (n - 1):
            raise ValueError(f"n_features must be a power of two >= 16, got {n}")

    def _hashes(self, keys: Sequence[UrlKey]) -> tuple[np.ndarray, np.ndarray]:
        rows, hashes = char_ngram_hashes([k.feature_text for k in keys],
                                         tuple(self.ngram_range), self.seed)
        if self.use_tokens:
            t_rows, t_hashes = token_hashes([k.tokens() for k in keys], self.seed)
            rows = np.concatenate((rows, t_rows))
            hashes = np.concatenate((hashes, t_hashes))
        return rows, columns(hashes, self.n_features)

    def transform(self, urls: Iterable[str | UrlKey]) -> sp.csr_matrix:
        """Feature matrix: each hashed occurrence adds ``1 / sqrt(occurrences in the row)``,
        so a column holds its count scaled by the row's size (a long URL does not outvote a
        short one), and a score is one gather-and-sum per URL on the request path."""
        self._check_params()
        keys = as_keys(urls)
        rows, cols = self._hashes(keys)
        n = len(keys)
        per_row = np.bincount(rows, minlength=n)
        scale = 1.0 / np.sqrt(np.maximum(per_row, 1)).astype(np.float32)
        order = np.argsort(rows, kind="stable")
        indptr = np.concatenate(([0], np.cumsum(per_row)))
        return sp.csr_matrix((scale[rows[order]], cols[order], indptr),
                             shape=(n, self.n_features))

    # ------------------------------------------------------------------ fitting
    def fit(
        self,
        urls: Sequence[str | UrlKey],
        labels: Sequence[str],
        taxonomy: Taxonomy | None = None,
        sample_weight: Sequence[float] | None = None,
    ) -> UrlModel:
        """Learn weights and temperature from labelled URLs; returns ``self``.

        Labels outside ``taxonomy`` raise ``TaxonomyError`` listing them. Without a taxonomy,
        the distinct labels become the category set (each with cost 1).
        """
        self._check_params()
        started = time.perf_counter()
        keys = as_keys(urls)
        labels = [str(x) for x in labels]
        if len(keys) != len(labels):
            raise ValueError(f"{len(keys)} URLs but {len(labels)} labels")
        if len(keys) < 2:
            raise ValueError("need at least two labelled URLs to fit")
        taxonomy = taxonomy or Taxonomy.from_labels(labels)
        y = taxonomy.encode(labels)
        classes = list(taxonomy.names)
        weight = None if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
        if self.class_balance:
            freq = np.bincount(y, minlength=len(classes)).astype(np.float64)
            per_class = (freq.sum() / np.maximum(freq, 1.0)) ** self.class_balance
            balance = per_class[y] / per_class[y].mean()
            weight = balance if weight is None else weight * balance
        X = self.transform(keys)
        present = np.unique(y)
        if len(present) < 2:
            raise TaxonomyError("training labels hold a single category; need at least two")

        def fit_linear(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            W, b, info = fit_softmax(
                X[rows], y[rows], len(classes), C=self.C,
                sample_weight=None if weight is None else weight[rows],
                max_iter=self.max_iter, min_count=self.min_count,
            )
            b[np.bincount(y[rows], minlength=len(classes)) == 0] = _ABSENT_CLASS_BIAS
            self.optimizer_ = info
            return W, b

        folds = self._calibration_folds(keys)
        temperature = 1.0
        all_rows = np.arange(len(keys))
        out_of_fold: list[np.ndarray] = []
        fold_rows: list[np.ndarray] = []
        for f in range(int(folds.max()) + 1 if folds.size else 0):
            held = folds == f
            if not held.any() or len(np.unique(y[~held])) < 2:
                continue
            W, b = fit_linear(all_rows[~held])
            out_of_fold.append(np.asarray(X[held] @ W) + b)
            fold_rows.append(all_rows[held])
        if out_of_fold:
            held_rows = np.concatenate(fold_rows)
            temperature = fit_temperature(np.concatenate(out_of_fold), y[held_rows])
        W, b = fit_linear(all_rows)
        self.classes_ = classes
        self.taxonomy_ = taxonomy
        self.weights_ = np.ascontiguousarray(W)
        self.intercept_ = b
        self.temperature_ = temperature
        self.training_ = {
            "n_rows": len(keys),
            "calibration": "temperature fitted on out-of-fold logits, "
                           f"{len(out_of_fold)} folds grouped by registered domain",
            "data_sha256": data_digest([k.url for k in keys], labels),
            "class_counts": {c: int((y == i).sum()) for i, c in enumerate(classes)},
            "seconds": round(time.perf_counter() - started, 3),
            "seed": self.seed,
            "optimizer": self.optimizer_,
        }
        return self

    def _calibration_folds(self, keys: Sequence[UrlKey]) -> np.ndarray:
        """Fold number per row: whole registered domains to a fold, by a seeded shuffle.
        All rows are -1 (no calibration) with fewer than 2 folds or too few rows."""
        return group_folds([k.registered_domain or k.host for k in keys],
                           self.calibration_folds, self.seed)

    # ------------------------------------------------------------------ scoring
    def _check_fitted(self) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError("this UrlModel is not fitted yet: call fit() or load()")

    def decision_function(self, urls: Iterable[str | UrlKey]) -> np.ndarray:
        """Temperature-scaled logits, shape (n, n_classes)."""
        self._check_fitted()
        X = self.transform(urls)
        row_of, compact = self._compact_weights()
        X = sp.csr_matrix((X.data, row_of[X.indices], X.indptr),
                          shape=(X.shape[0], compact.shape[0]))
        return (np.asarray(X @ compact, dtype=np.float64) + self.intercept_) / \
            self.temperature_

    def _compact_weights(self) -> tuple[np.ndarray, np.ndarray]:
        """The packed weight table (see ``compact_table``), cached per weight array."""
        cached = getattr(self, "_compact", None)
        if cached is not None and cached[2] is self.weights_:
            return cached[0], cached[1]
        row_of, compact = compact_table(self.weights_)
        self._compact = (row_of, compact, self.weights_)
        return row_of, compact

    def predict_proba(self, urls: Iterable[str | UrlKey]) -> np.ndarray:
        """Calibrated class probabilities, shape (n, n_classes), columns in ``classes_`` order."""
        return softmax(self.decision_function(urls))

    def predict(self, urls: Iterable[str | UrlKey]) -> list[str]:
        proba = self.predict_proba(urls)
        return [self.classes_[i] for i in proba.argmax(axis=1)]

    def predict_proba_one(self, url: str | UrlKey) -> np.ndarray:
        """Probabilities for a single URL, on a short path for the request path (no sparse
        matrix is built). Same numbers as ``predict_proba([url])[0]``."""
        self._check_fitted()
        key = url if isinstance(url, UrlKey) else normalize(url)
        hashes = char_ngram_hashes_one(key.feature_text, tuple(self.ngram_range), self.seed)
        if self.use_tokens:
            hashes = np.concatenate((hashes, token_hashes([key.tokens()], self.seed)[1]))
        cols = columns(hashes, self.n_features)
        t = self.temperature_
        row_of, compact = self._compact_weights()
        logits = compact.take(row_of.take(cols), axis=0).sum(axis=0, dtype=np.float64)
        logits *= 1.0 / (t * math.sqrt(max(1, cols.shape[0])))
        logits += self.intercept_ / t
        logits -= logits.max()
        z = np.exp(logits, out=logits)
        z /= z.sum()
        return z

    # ------------------------------------------------------------------ explanation
    def explain(self, url: str | UrlKey, top: int = 8, classes: Sequence[str] | None = None,
                n_classes: int = 3) -> Explanation:
        """Exact per-feature contributions to the logits of the ``n_classes`` most probable
        classes (or of the named ``classes``): which substrings pushed the verdict where."""
        self._check_fitted()
        key = url if isinstance(url, UrlKey) else normalize(url)
        names = self._feature_names(key)
        _, cols = self._hashes([key])
        uniq, inverse, counts = np.unique(cols, return_inverse=True, return_counts=True)
        values = counts.astype(np.float64) / np.sqrt(max(1, cols.shape[0]))
        W = self.weights_[uniq].astype(np.float64)
        per_feature = values[:, None] * W / self.temperature_  # (n_uniq, k)
        bias = self.intercept_ / self.temperature_
        logits = per_feature.sum(axis=0) + bias
        proba = softmax(logits[None, :])[0]
        if classes is None:
            chosen = list(np.argsort(-proba)[:n_classes])
        else:
            chosen = [self.classes_.index(self.taxonomy_.names[self.taxonomy_.index(c)])
                      for c in classes]
        labels_for: list[list[str]] = [[] for _ in uniq]
        for pos, u in enumerate(inverse):
            label = names[pos]
            if label not in labels_for[u]:
                labels_for[u].append(label)
        out, rest = [], []
        for c in chosen:
            order = np.argsort(-np.abs(per_feature[:, c]))
            shown = order[:top]
            contribs = tuple(
                Contribution(
                    feature=" | ".join(labels_for[i]),
                    kind="token" if all(":" in s and s.split(":", 1)[0] in _PLACES
                                        for s in labels_for[i]) else "chars",
                    value=float(per_feature[i, c]),
                )
                for i in shown
            )
            rest.append(float(per_feature[order[top:], c].sum()))
            out.append(ClassExplanation(self.classes_[c], float(proba[c]), float(logits[c]),
                                        float(bias[c]), contribs))
        return Explanation(key.url, tuple(out), tuple(rest))

    def _feature_names(self, key: UrlKey) -> list[str]:
        """The readable name of every hashed occurrence, in the order ``_hashes`` makes them."""
        lo, hi = self.ngram_range
        data = b"\x02" + key.feature_text.encode("utf-8", "surrogatepass") + b"\x03"
        names: list[str] = []
        for n in range(lo, hi + 1):
            for i in range(len(data) - n + 1):
                piece = data[i : i + n]
                text = piece.decode("utf-8", "replace").replace("\x02", "^").replace("\x03", "$")
                names.append(text)
        if self.use_tokens:
            names.extend(f"{place}:{word}" for place, word in key.tokens())
        return names

    # ------------------------------------------------------------------ files
    def save(self, path: str | Path, metrics: dict[str, Any] | None = None) -> Path:
        """Write ``model.json`` + ``weights.npz`` (non-zero rows only) to directory ``path``."""
        self._check_fitted()
        meta = {
            "cascade_version": __version__,
            "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "params": self.get_params(),
            "classes": list(self.classes_),
            "taxonomy": self.taxonomy_.to_dict(),
            "calibration": {"method": "temperature", "temperature": self.temperature_},
            "training": self.training_,
            "metrics": metrics or {},
        }
        arrays = {**pack_rows(self.weights_), "intercept": self.intercept_.astype(np.float64)}
        target = save_model_dir(path, KIND, meta, arrays)
        self.version_ = "url-" + load_model_dir(target, KIND)[0]["content_sha256"][:12]
        self.metrics_ = metrics or {}
        return target

    @property
    def version(self) -> str:
        """``url-`` and the first 12 hex digits of the model file's content digest."""
        return getattr(self, "version_", "url-unsaved")

    @classmethod
    def load(cls, path: str | Path) -> UrlModel:
        """Read a model directory, verifying every digest; raises ``ModelFileError``."""
        meta, arrays = load_model_dir(path, KIND)
        try:
            params = meta["params"]
            model = cls(**{**params, "ngram_range": tuple(params["ngram_range"])})
            model._check_params()
            classes = [str(c) for c in meta["classes"]]
            intercept = arrays["intercept"]
            if intercept.shape != (len(classes),):
                raise ModelFileError(f"{path}: array shapes do not match the class list")
            W = unpack_rows(arrays, model.n_features, len(classes), str(path))
            model.classes_ = classes
            model.taxonomy_ = Taxonomy.from_dict(meta["taxonomy"])
            model.weights_ = W
            model.intercept_ = intercept.astype(np.float64)
            model.temperature_ = float(meta["calibration"]["temperature"])
            model.training_ = meta.get("training", {})
            model.metrics_ = meta.get("metrics", {})
            model.version_ = "url-" + str(meta["content_sha256"])[:12]
            if not model.temperature_ > 0:
                raise ModelFileError(f"{path}: temperature must be positive")
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, ModelFileError):
                raise
            raise ModelFileError(f"{path}: model.json is missing or has a bad field: {exc}") \
                from None
        return model

    def get_params(self) -> dict[str, Any]:
        return {
            "ngram_range": list(self.ngram_range),
            "n_features": self.n_features,
            "use_tokens": self.use_tokens,
            "C": self.C,
            "max_iter": self.max_iter,
            "min_count": self.min_count,
            "class_balance": self.class_balance,
            "calibration_folds": self.calibration_folds,
            "seed": self.seed,
        }

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"UrlModel({params})"


_PLACES = {"host", "domain", "suffix", "path", "query"}
