"""The page model: field-tagged hashed words of a fetched page, a multinomial linear model,
and temperature scaling, in the same safe file format as the URL model.

Features: word unigrams and bigrams per field (a word in the title is another feature than
in the body), sub-linear counts (``1 + log tf``) times an inverse document frequency learned
at ``fit``, each field L2-normalized and weighted, then the row normalized; pages with very
few words also get character n-grams of their title and body, which carry more there.
"""

from __future__ import annotations

import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

from cascade import __version__
from cascade.errors import ModelFileError, NotFittedError, TaxonomyError
from cascade.models.calibration import fit_temperature, softmax
from cascade.models.folds import group_folds
from cascade.models.hashing import char_ngram_hashes_one, columns
from cascade.models.linear import compact_table, pack_rows, unpack_rows
from cascade.models.model_files import data_digest, load_model_dir, save_model_dir
from cascade.models.softmax import fit_softmax
from cascade.models.text_features import (
    FIELD_INDEX,
    FIELDS,
    PageLike,
    TextSettings,
    WordHasher,
    field_names,
    field_words,
)
from cascade.models.url_model import ClassExplanation, Contribution, Explanation
from cascade.taxonomy import Taxonomy

KIND = "page-model"
_ABSENT_CLASS_BIAS = -30.0
DEFAULT_FIELD_WEIGHTS = {"title": 0.8, "desc": 0.6, "head": 0.6, "body": 1.0,
                         "anchor": 0.5, "link": 0.4, "chars": 0.6}


def as_pages(items: Iterable[Any]) -> list[PageLike]:
    """Pages as the model reads them: a ``PageText`` (or anything with its fields) passes
    through; a string is extracted (HTML when it has markup, else plain text)."""
    from cascade.extract import extract

    out: list[PageLike] = []
    for item in items:
        if hasattr(item, "body") and hasattr(item, "title"):
            out.append(item)
        elif isinstance(item, str | bytes):
            text = item if isinstance(item, str) else item.decode("utf-8", "replace")
            kind = "text/html" if "<" in text[:4096] else "text/plain"
            out.append(extract(text, content_type=kind))
        else:
            raise TypeError(f"a page must be a PageText, HTML or text, not "
                            f"{type(item).__name__}")
    return out


class PageModel:
    """Calibrated multinomial linear model over hashed, field-tagged page words.

    Parameters
    ----------
    n_features : hashing space (a power of two).
    bigrams : also hash word pairs within each field.
    short_page_words : pages with fewer words also get character n-grams (0: never).
    field_weights : weight of each field's normalized vector (keys from ``FIELDS``).
    C, max_iter, min_count : as for the URL model's logistic regression.
    calibration_folds : temperature fitted on out-of-fold logits, grouped by ``groups``.
    seed : hash key and fold shuffle; recorded in the model file.
    """

    def __init__(
        self,
        n_features: int = 2**20,
        bigrams: bool = True,
        short_page_words: int = 40,
        field_weights: dict[str, float] | None = None,
        C: float = 20.0,
        max_iter: int = 200,
        min_count: int = 2,
        calibration_folds: int = 3,
        seed: int = 0,
    ) -> None:
        self.n_features = n_features
        self.bigrams = bigrams
        self.short_page_words = short_page_words
        self.field_weights = field_weights
        self.C = C
        self.max_iter = max_iter
        self.min_count = min_count
        self.calibration_folds = calibration_folds
        self.seed = seed

    # ------------------------------------------------------------------ features
    def _check_params(self) -> None:
        n = self.n_features
        if n < 16 or n & (n - 1):
            raise ValueError(f"n_features must be a power of two >= 16, got {n}")
        unknown = set(self.field_weights or {}) - set(FIELDS)
        if unknown:
            raise ValueError(f"unknown fields in field_weights: {sorted(unknown)}; "
                             f"known: {list(FIELDS)}")

    def _settings(self) -> TextSettings:
        return TextSettings(bigrams=self.bigrams, short_page_words=self.short_page_words)

    def _hasher(self) -> WordHasher:
        hasher = getattr(self, "_word_hasher", None)
        if hasher is None or hasher.seed != self.seed:
            hasher = WordHasher(self.seed)
            self._word_hasher = hasher
        return hasher

    def _occurrences(self, pages: Sequence[PageLike], with_names: bool = False
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
        """Every hashed feature occurrence: (row, field index, column), plus names."""
        settings = self._settings()
        hasher = self._hasher()
        rows, fields, hashes = [], [], []
        names: list[str] = []
        for i, page in enumerate(pages):
            per_field = field_words(page, settings)
            n_words = sum(len(w) for f, w in per_field if f != "link")
            for name, tokens in per_field:
                if not tokens:
                    continue
                h = hasher.field_hashes(name, tokens, settings.bigrams)
                rows.append(np.full(h.shape[0], i, dtype=np.int64))
                fields.append(np.full(h.shape[0], FIELD_INDEX[name], dtype=np.int64))
                hashes.append(h)
                if with_names:
                    names.extend(field_names(name, tokens, settings.bigrams))
            if n_words < settings.short_page_words:
                text = " ".join((page.title, page.body))[: settings.max_char_text].lower()
                if text.strip():
                    h = char_ngram_hashes_one(text, settings.char_ngram_range,
                                              self.seed ^ 0x5BD1E995)
                    rows.append(np.full(h.shape[0], i, dtype=np.int64))
                    fields.append(np.full(h.shape[0], FIELD_INDEX["chars"], dtype=np.int64))
                    hashes.append(h)
                    if with_names:
                        names.extend(_char_names(text, settings.char_ngram_range))
        if not hashes:
            empty = np.zeros(0, np.int64)
            return empty, empty, np.zeros(0, np.intp), names
        return (np.concatenate(rows), np.concatenate(fields),
                columns(np.concatenate(hashes), self.n_features), names)

    def _counts(self, pages: Sequence[PageLike]) -> sp.csr_matrix:
        """Occurrence counts, one matrix row per (page, field)."""
        rows, fields, cols, _ = self._occurrences(pages)
        n_fields = len(FIELDS)
        M = sp.csr_matrix((np.ones(rows.shape[0], np.float64), (rows * n_fields + fields, cols)),
                          shape=(len(pages) * n_fields, self.n_features))
        M.sum_duplicates()
        return M

    def _weigh(self, M: sp.csr_matrix, n_pages: int, idf: np.ndarray) -> sp.csr_matrix:
        """``1 + log tf`` times idf, per-field L2 norm times the field's weight, then rows."""
        M = M.copy()
        M.data = (1.0 + np.log(M.data)) * idf[M.indices]
        norms = np.sqrt(np.asarray(M.multiply(M).sum(axis=1)).ravel())
        weights = {**DEFAULT_FIELD_WEIGHTS, **(self.field_weights or {})}
        per_field = np.array([weights[f] for f in FIELDS])
        n_fields = len(FIELDS)
        scale = np.tile(per_field, n_pages) / np.maximum(norms, 1e-12)
        collapse = sp.csr_matrix((scale, (np.repeat(np.arange(n_pages), n_fields),
                                          np.arange(n_pages * n_fields))),
                                 shape=(n_pages, n_pages * n_fields))
        X = (collapse @ M).tocsr()
        row_norm = np.sqrt(np.asarray(X.multiply(X).sum(axis=1)).ravel())
        X = sp.diags(1.0 / np.maximum(row_norm, 1e-12)) @ X
        return sp.csr_matrix(X, dtype=np.float32)

    def transform(self, pages: Iterable[Any]) -> sp.csr_matrix:
        """Feature matrix (n_pages, n_features) with the fitted idf."""
        self._check_fitted()
        pages = as_pages(pages)
        return self._weigh(self._counts(pages), len(pages), self.idf_)

    # ------------------------------------------------------------------ fitting
    def fit(
        self,
        pages: Sequence[Any],
        labels: Sequence[str],
        taxonomy: Taxonomy | None = None,
        groups: Sequence[str] | None = None,
    ) -> PageModel:
        """Learn idf, weights and temperature from labelled pages; returns ``self``.

        ``groups`` (e.g. each page's registered domain) keeps a site on one side of the
        calibration folds; without it, rows are shuffled one by one.
        """
        self._check_params()
        started = time.perf_counter()
        pages = as_pages(pages)
        labels = [str(x) for x in labels]
        if len(pages) != len(labels):
            raise ValueError(f"{len(pages)} pages but {len(labels)} labels")
        if len(pages) < 2:
            raise ValueError("need at least two labelled pages to fit")
        taxonomy = taxonomy or Taxonomy.from_labels(labels)
        y = taxonomy.encode(labels)
        classes = list(taxonomy.names)
        if len(np.unique(y)) < 2:
            raise TaxonomyError("training labels hold a single category; need at least two")
        n = len(pages)
        M = self._counts(pages)
        page_of = M.tocoo().row // len(FIELDS)
        pairs = np.unique(page_of.astype(np.int64) * self.n_features + M.tocoo().col)
        df = np.bincount(pairs % self.n_features, minlength=self.n_features)
        idf = (np.log((1.0 + n) / (1.0 + df)) + 1.0).astype(np.float64)
        X = self._weigh(M, n, idf)

        def fit_linear(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            W, b, info = fit_softmax(X[rows], y[rows], len(classes), C=self.C,
                                     max_iter=self.max_iter, min_count=self.min_count)
            b[np.bincount(y[rows], minlength=len(classes)) == 0] = _ABSENT_CLASS_BIAS
            self.optimizer_ = info
            return W, b

        group_list = list(groups) if groups is not None else [str(i) for i in range(n)]
        if len(group_list) != n:
            raise ValueError(f"{n} pages but {len(group_list)} groups")
        folds = group_folds(group_list, self.calibration_folds, self.seed)
        all_rows = np.arange(n)
        held_logits, held_rows = [], []
        for f in range(int(folds.max()) + 1 if folds.size else 0):
            held = folds == f
            if not held.any() or len(np.unique(y[~held])) < 2:
                continue
            W, b = fit_linear(all_rows[~held])
            held_logits.append(np.asarray(X[held] @ W) + b)
            held_rows.append(all_rows[held])
        temperature = 1.0
        if held_logits:
            temperature = fit_temperature(np.concatenate(held_logits),
                                          y[np.concatenate(held_rows)])
        W, b = fit_linear(all_rows)
        self.classes_ = classes
        self.taxonomy_ = taxonomy
        self.idf_ = idf
        self.weights_ = np.ascontiguousarray(W)
        self.intercept_ = b
        self.temperature_ = temperature
        self.training_ = {
            "n_rows": n,
            "calibration": f"temperature fitted on out-of-fold logits, {len(held_logits)} "
                           "folds grouped by site" if groups is not None else
                           f"temperature fitted on out-of-fold logits, {len(held_logits)} folds",
            "data_sha256": data_digest([p.title + "\x1f" + p.body[:2000] for p in pages],
                                       labels),
            "class_counts": {c: int((y == i).sum()) for i, c in enumerate(classes)},
            "seconds": round(time.perf_counter() - started, 3),
            "seed": self.seed,
            "optimizer": self.optimizer_,
        }
        return self

    # ------------------------------------------------------------------ scoring
    def _check_fitted(self) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError("this PageModel is not fitted yet: call fit() or load()")

    def _compact_weights(self) -> tuple[np.ndarray, np.ndarray]:
        cached = getattr(self, "_compact", None)
        if cached is not None and cached[2] is self.weights_:
            return cached[0], cached[1]
        row_of, table = compact_table(self.weights_)
        self._compact = (row_of, table, self.weights_)
        return row_of, table

    def decision_function(self, pages: Iterable[Any]) -> np.ndarray:
        """Temperature-scaled logits, shape (n, n_classes)."""
        X = self.transform(pages)
        row_of, table = self._compact_weights()
        X = sp.csr_matrix((X.data, row_of[X.indices], X.indptr),
                          shape=(X.shape[0], table.shape[0]))
        return (np.asarray(X @ table, dtype=np.float64) + self.intercept_) / self.temperature_

    def predict_proba(self, pages: Iterable[Any]) -> np.ndarray:
        """Calibrated class probabilities, columns in ``classes_`` order."""
        return softmax(self.decision_function(pages))

    def predict(self, pages: Iterable[Any]) -> list[str]:
        return [self.classes_[i] for i in self.predict_proba(pages).argmax(axis=1)]

    # ------------------------------------------------------------------ explanation
    def explain(self, page: Any, top: int = 8, classes: Sequence[str] | None = None,
                n_classes: int = 3, url: str = "") -> Explanation:
        """Exact per-feature contributions (``field:word`` or ``field:word word``) to the
        logits of the most probable classes: which page words drove the verdict."""
        self._check_fitted()
        (page,) = as_pages([page])
        rows, fields, cols, names = self._occurrences([page], with_names=True)
        X = self.transform([page])
        uniq = np.unique(cols)
        values = np.asarray(X[0, uniq].todense()).ravel().astype(np.float64)
        per_feature = values[:, None] * self.weights_[uniq].astype(np.float64) / \
            self.temperature_
        bias = self.intercept_ / self.temperature_
        logits = per_feature.sum(axis=0) + bias
        proba = softmax(logits[None, :])[0]
        if classes is None:
            chosen = list(np.argsort(-proba)[:n_classes])
        else:
            chosen = [self.classes_.index(self.taxonomy_.names[self.taxonomy_.index(c)])
                      for c in classes]
        position = {c: i for i, c in enumerate(uniq)}
        labels_for: list[list[str]] = [[] for _ in uniq]
        for col, name in zip(cols, names, strict=True):
            bucket = labels_for[position[col]]
            if name not in bucket and len(bucket) < 3:
                bucket.append(name)
        out, rest = [], []
        for c in chosen:
            order = np.argsort(-np.abs(per_feature[:, c]))
            shown = order[:top]
            contributions = tuple(
                Contribution(feature=" | ".join(labels_for[i]),
                             kind=labels_for[i][0].split(":", 1)[0] if labels_for[i] else "",
                             value=float(per_feature[i, c]))
                for i in shown)
            rest.append(float(per_feature[order[top:], c].sum()))
            out.append(ClassExplanation(self.classes_[c], float(proba[c]), float(logits[c]),
                                        float(bias[c]), contributions))
        return Explanation(url or (getattr(page, "url", None) or ""), tuple(out), tuple(rest))

    # ------------------------------------------------------------------ files
    def save(self, path: str | Path, metrics: dict[str, Any] | None = None) -> Path:
        """Write ``model.json`` + ``weights.npz`` to directory ``path``."""
        self._check_fitted()
        seen = np.flatnonzero(self.idf_ != self.idf_.max()).astype(np.int64)
        meta = {
            "cascade_version": __version__,
            "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "params": self.get_params(),
            "classes": list(self.classes_),
            "taxonomy": self.taxonomy_.to_dict(),
            "calibration": {"method": "temperature", "temperature": self.temperature_},
            "idf_default": float(self.idf_.max()),
            "training": self.training_,
            "metrics": metrics or {},
        }
        arrays = {**pack_rows(self.weights_), "intercept": self.intercept_.astype(np.float64),
                  "idf_rows": seen, "idf_values": self.idf_[seen]}
        target = save_model_dir(path, KIND, meta, arrays)
        self.version_ = "page-" + load_model_dir(target, KIND)[0]["content_sha256"][:12]
        return target

    @property
    def version(self) -> str:
        return getattr(self, "version_", "page-unsaved")

    @classmethod
    def load(cls, path: str | Path) -> PageModel:
        """Read a page-model directory, verifying every digest; raises ``ModelFileError``."""
        meta, arrays = load_model_dir(path, KIND)
        try:
            model = cls(**meta["params"])
            model._check_params()
            classes = [str(c) for c in meta["classes"]]
            model.weights_ = unpack_rows(arrays, model.n_features, len(classes), str(path))
            intercept = arrays["intercept"]
            if intercept.shape != (len(classes),):
                raise ModelFileError(f"{path}: array shapes do not match the class list")
            idf_rows, idf_values = arrays["idf_rows"], arrays["idf_values"]
            if idf_rows.shape != idf_values.shape or (
                    idf_rows.size and (idf_rows.min() < 0 or idf_rows.max() >= model.n_features)):
                raise ModelFileError(f"{path}: idf arrays are malformed")
            idf = np.full(model.n_features, float(meta["idf_default"]))
            idf[idf_rows] = idf_values
            model.idf_ = idf
            model.classes_ = classes
            model.taxonomy_ = Taxonomy.from_dict(meta["taxonomy"])
            model.intercept_ = intercept.astype(np.float64)
            model.temperature_ = float(meta["calibration"]["temperature"])
            model.training_ = meta.get("training", {})
            model.metrics_ = meta.get("metrics", {})
            model.version_ = "page-" + str(meta["content_sha256"])[:12]
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
            "n_features": self.n_features,
            "bigrams": self.bigrams,
            "short_page_words": self.short_page_words,
            "field_weights": self.field_weights,
            "C": self.C,
            "max_iter": self.max_iter,
            "min_count": self.min_count,
            "calibration_folds": self.calibration_folds,
            "seed": self.seed,
        }

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"PageModel({params})"


def _char_names(text: str, ngram_range: tuple[int, int]) -> list[str]:
    """Names of ``char_ngram_hashes_one`` occurrences, in its order (n-major)."""
    data = b"\x02" + text.encode("utf-8", "surrogatepass") + b"\x03"
    lo, hi = ngram_range
    return ["chars:" + data[i: i + n].decode("utf-8", "replace").replace("\x02", "^")
            .replace("\x03", "$") for n in range(lo, hi + 1) for i in range(len(data) - n + 1)]
