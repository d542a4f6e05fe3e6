"""The page model: field-tagged hashed words of a fetched page, a multinomial linear model,
and temperature scaling, in the same safe file format as the URL model.

Features: word unigrams and bigrams per field (a word in the title is another feature than
in the body), sub-linear counts (``1 + log tf``) times an inverse document frequency learned
at ``fit``, each field L2-normalized and weighted, then the row normalized; pages with very
few words also get character n-grams of their title and body, which carry more there.
Fitting, calibration, scoring, explanation and files come from ``CalibratedLinearClassifier``.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp

from cascade.errors import ModelFileError
from cascade.models.calibrated_linear import CalibratedLinearClassifier
from cascade.models.explanation import Explanation
from cascade.models.hashing import char_ngram_hashes_one, columns
from cascade.models.model_files import data_digest
from cascade.models.params import Constraint, Interval, OneOf
from cascade.models.text_features import (
    FIELD_INDEX,
    FIELDS,
    PageLike,
    TextSettings,
    WordHasher,
    field_names,
    field_words,
)

__all__ = ["DEFAULT_FIELD_WEIGHTS", "PageModel", "as_pages"]

DEFAULT_FIELD_WEIGHTS = {"title": 0.8, "desc": 0.6, "head": 0.6, "body": 1.0,
                         "anchor": 0.5, "link": 0.4, "chars": 0.6}


def _field_weights_ok(value: Any) -> bool:
    return value is None or (isinstance(value, dict) and set(value) <= set(FIELDS) and all(
        isinstance(v, int | float) and not isinstance(v, bool) and v >= 0
        for v in value.values()))


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


class PageModel(CalibratedLinearClassifier):
    """Calibrated multinomial linear model over hashed, field-tagged page words.

    Parameters
    ----------
    n_features : hashing space (a power of two).
    bigrams : also hash word pairs within each field.
    short_page_words : pages with fewer words also get character n-grams (0: never).
    field_weights : weight of each field's normalized vector (keys from ``FIELDS``).
    C, tol, max_iter, min_count, n_jobs : as for the URL model's logistic regression.
    calibration : ``"temperature"`` (default) or ``"top-label"`` (as for the URL model).
    calibration_folds : temperature fitted on out-of-fold logits, grouped by ``groups``.
    calibration_rows : as for the URL model: folds stop once this many rows are held out.
    seed : hash key and fold shuffle; recorded in the model file.
    """

    _model_kind = "page-model"
    _version_prefix = "page"
    _item_name = "pages"
    _param_rules: ClassVar[dict[str, Constraint]] = {
        **CalibratedLinearClassifier._param_rules,
        "bigrams": OneOf((True, False)),
        "short_page_words": Interval(0, None, integer=True),
        "field_weights": OneOf(test=_field_weights_ok,
                               text=f"None or a dict of weights >= 0 keyed by {list(FIELDS)}"),
    }

    def __init__(
        self,
        n_features: int = 2**20,
        bigrams: bool = True,
        short_page_words: int = 40,
        field_weights: dict[str, float] | None = None,
        C: float = 20.0,
        tol: float = 3e-4,
        max_iter: int = 2000,
        min_count: int = 2,
        calibration: str = "temperature",
        calibration_folds: int = 3,
        calibration_rows: int | None = None,
        n_jobs: int | None = -1,
        seed: int = 0,
    ) -> None:
        self.n_features = n_features
        self.bigrams = bigrams
        self.short_page_words = short_page_words
        self.field_weights = field_weights
        self.C = C
        self.tol = tol
        self.max_iter = max_iter
        self.min_count = min_count
        self.calibration = calibration
        self.calibration_folds = calibration_folds
        self.calibration_rows = calibration_rows
        self.n_jobs = n_jobs
        self.seed = seed

    # ------------------------------------------------------------------ features
    def _as_items(self, X: Any) -> list[PageLike]:
        return as_pages(X)

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

    def _transform(self, pages: Sequence[PageLike]) -> sp.csr_matrix:
        self._check_fitted()
        return self._weigh(self._counts(pages), len(pages), self.idf_)

    def _prepare(self, pages: Sequence[PageLike]) -> sp.csr_matrix:
        return self._counts(pages)

    def _design(self, counts: sp.csr_matrix, rows: np.ndarray | None
                ) -> tuple[sp.csr_matrix, dict[str, Any]]:
        """All rows weighed with an idf learned from ``rows`` (all when None) only."""
        n_fields = len(FIELDS)
        n_pages = counts.shape[0] // n_fields
        coo = counts.tocoo()
        page_of = coo.row // n_fields
        keep = np.ones(coo.nnz, dtype=bool) if rows is None else np.isin(page_of, rows)
        n = n_pages if rows is None else len(rows)
        pairs = np.unique(page_of[keep].astype(np.int64) * self.n_features + coo.col[keep])
        df = np.bincount(pairs % self.n_features, minlength=self.n_features)
        idf = (np.log((1.0 + n) / (1.0 + df)) + 1.0).astype(np.float64)
        return self._weigh(counts, n_pages, idf), {"idf_": idf}

    def _group_name(self) -> str:
        return "the given groups"

    def _data_digest(self, pages: Sequence[PageLike], labels: list[str]) -> str:
        return data_digest([p.title + "\x1f" + p.body[:2000] for p in pages], labels)

    # ------------------------------------------------------------------ explanation
    def explain(self, page: Any, top: int = 8, classes: Sequence[str] | None = None,
                n_classes: int = 3, url: str = "") -> Explanation:
        """Exact per-feature contributions (``field:word`` or ``field:word word``) to the
        logits of the most probable classes: which page words drove the verdict."""
        self._check_fitted()
        (page,) = as_pages([page])
        return self._explain_item(page, url or (getattr(page, "url", None) or ""), top,
                                  classes, n_classes)

    def _explain_terms(self, page: PageLike) -> tuple[np.ndarray, np.ndarray, list[list[str]]]:
        _rows, _fields, cols, names = self._occurrences([page], with_names=True)
        X = self._transform([page])
        uniq = np.unique(cols)
        values = np.asarray(X[0, uniq].todense()).ravel().astype(np.float64)
        position = {c: i for i, c in enumerate(uniq)}
        labels_for: list[list[str]] = [[] for _ in uniq]
        for col, name in zip(cols, names, strict=True):
            bucket = labels_for[position[col]]
            if name not in bucket and len(bucket) < 3:
                bucket.append(name)
        return uniq, values, labels_for

    def _term_kind(self, names: list[str]) -> str:
        return names[0].split(":", 1)[0] if names else ""

    # ------------------------------------------------------------------ files
    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        meta, arrays = super()._file_state()
        seen = np.flatnonzero(self.idf_ != self.idf_.max()).astype(np.int64)
        meta["idf_default"] = float(self.idf_.max())
        arrays.update({"idf_rows": seen, "idf_values": self.idf_[seen]})
        return meta, arrays

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        super()._restore_state(meta, arrays, where)
        idf_rows, idf_values = arrays["idf_rows"], arrays["idf_values"]
        if idf_rows.shape != idf_values.shape or idf_rows.ndim != 1 or (
                idf_rows.size and (idf_rows.min() < 0 or idf_rows.max() >= self.n_features)):
            raise ModelFileError(f"{where}: idf arrays are malformed")
        idf = np.full(self.n_features, float(meta["idf_default"]))
        idf[idf_rows] = idf_values
        self.idf_ = idf


def _char_names(text: str, ngram_range: tuple[int, int]) -> list[str]:
    """Names of ``char_ngram_hashes_one`` occurrences, in its order (n-major)."""
    data = b"\x02" + text.encode("utf-8", "surrogatepass") + b"\x03"
    lo, hi = ngram_range
    return ["chars:" + data[i: i + n].decode("utf-8", "replace").replace("\x02", "^")
            .replace("\x03", "$") for n in range(lo, hi + 1) for i in range(len(data) - n + 1)]
