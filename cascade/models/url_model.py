"""The URL model: hashed character n-grams and tagged tokens, a multinomial linear model,
and temperature scaling, so its probabilities can be read as probabilities.

It reads only the URL string, so it is cheap enough for the request path; the cascade uses
its confidence to decide which URLs are worth a page fetch. Fitting, calibration, scoring,
explanation and model files come from ``CalibratedLinearClassifier``; this module holds the
URL features only.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp

from cascade.errors import InvalidURL
from cascade.models.calibrated_linear import CalibratedLinearClassifier
from cascade.models.explanation import ClassExplanation, Contribution, Explanation, Span
from cascade.models.hashing import (
    char_ngram_hashes,
    char_ngram_hashes_one,
    columns,
    token_hashes,
)
from cascade.models.model_files import data_digest
from cascade.models.params import Constraint, Interval, OneOf, Range
from cascade.urls import UrlKey, normalize

__all__ = ["ClassExplanation", "Contribution", "Explanation", "UrlModel", "as_keys"]

_PLACES = {"host", "domain", "suffix", "path", "query"}
_CHUNK = 65536  # URLs featurized at once


def _stack(parts: list[sp.csr_matrix], width: int) -> sp.csr_matrix:
    """Stack CSR row chunks, freeing each chunk once copied: the peak is the result plus
    one chunk, where ``sp.vstack`` holds all chunks and the result at once (at a million
    URLs, more than a gigabyte more)."""
    nnz = sum(p.nnz for p in parts)
    rows = sum(p.shape[0] for p in parts)
    index = np.int32 if nnz < 2**31 else np.int64
    data = np.empty(nnz, dtype=np.float32)
    indices = np.empty(nnz, dtype=index)
    indptr = np.zeros(rows + 1, dtype=index)
    at = row = 0
    for j in range(len(parts)):
        part, parts[j] = parts[j], None
        data[at:at + part.nnz] = part.data
        indices[at:at + part.nnz] = part.indices
        indptr[row + 1:row + part.shape[0] + 1] = part.indptr[1:] + at
        at += part.nnz
        row += part.shape[0]
        del part
    return sp.csr_matrix((data, indices, indptr), shape=(rows, width), copy=False)


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


class UrlModel(CalibratedLinearClassifier):
    """Calibrated multinomial linear model over hashed URL features.

    Parameters
    ----------
    ngram_range : smallest and largest character n-gram, in UTF-8 bytes.
    n_features : hashing space (a power of two); memory is ``n_features * n_classes * 4`` bytes.
    use_tokens : also hash position-tagged words (host label, registered domain, path, query).
    C : inverse L2 regularization strength of the logistic regression.
    tol : the fit stops when the largest gradient component falls below it (scikit-learn's
        ``LogisticRegression`` criterion; its default is 1e-4). Measured on the
        open-directory hosts, 3e-4 ends within 0.4% of the optimum's objective with the same
        held-out accuracy and temperature within 0.5%, in a third of the iterations.
    max_iter : a safety bound on L-BFGS iterations; reaching it warns (``ConvergenceWarning``).
    min_count : a hashed column seen in fewer training rows gets no weight.
    class_balance : weight each training row by ``(1 / class frequency) ** class_balance``
        (0: no weighting). Raises macro-F1 on skewed data at some cost in accuracy and
        calibration; the temperature is still fitted, on unweighted out-of-fold rows.
    calibration : ``"top-label"`` (default): after the temperature, a monotone map of the
        winning class's probability fitted on the same out-of-fold rows (``TopLabelMap``;
        never changes the winner). Measured on the three benchmark sets' held-out sides,
        ECE 0.0785 -> 0.0487 on the demo scenario, 0.0146 -> 0.0108 on open-directory
        hosts, 0.0366 -> 0.0393 on domain-categories (docs/url-model.md). ``"temperature"``: the
        temperature alone.
    calibration_folds : the temperature is fitted on out-of-fold logits from this many fits,
        each leaving out a share of the registered domains (so it is measured on domains
        the model has not seen, as in use); the final weights are fitted on all rows.
        Below 2: no calibration (temperature 1).
    calibration_rows : folds stop once this many rows have been held out (None, the
        default: all folds). A speed knob for very large sets, not a free one: held-out
        folds of whole domains differ, so fewer folds give a noisier temperature
        (measured on 1,000,000 demo URLs: with 100,000, one fold, 282 s and a temperature of
        2.05; with all three folds, in another run on the same generator, 515 s and 1.61,
        docs/url-model.md). Folds given to ``fit`` are always all used.
    n_jobs : threads for the solver's sparse products (scikit-learn's meaning; -1: all
        cores). The result does not depend on it.
    seed : fixes the hash salt and the calibration split; recorded in the model file.
    """

    _model_kind = "url-model"
    _version_prefix = "url"
    _item_name = "URLs"
    _fixed_design = True
    _param_rules: ClassVar[dict[str, Constraint]] = {
        **CalibratedLinearClassifier._param_rules,
        "ngram_range": Range(1, 12),
        "use_tokens": OneOf((True, False)),
        "class_balance": Interval(0, None),
    }

    def __init__(
        self,
        ngram_range: tuple[int, int] = (3, 6),
        n_features: int = 2**20,
        use_tokens: bool = True,
        C: float = 50.0,
        tol: float = 3e-4,
        max_iter: int = 2000,
        min_count: int = 2,
        class_balance: float = 1.0,
        calibration: str = "top-label",
        calibration_folds: int = 3,
        calibration_rows: int | None = None,
        n_jobs: int | None = -1,
        seed: int = 0,
    ) -> None:
        self.ngram_range = ngram_range
        self.n_features = n_features
        self.use_tokens = use_tokens
        self.C = C
        self.tol = tol
        self.max_iter = max_iter
        self.min_count = min_count
        self.class_balance = class_balance
        self.calibration = calibration
        self.calibration_folds = calibration_folds
        self.calibration_rows = calibration_rows
        self.n_jobs = n_jobs
        self.seed = seed

    # ------------------------------------------------------------------ features
    def _as_items(self, X: Any) -> list[UrlKey]:
        return as_keys(X)

    def _hashes(self, keys: Sequence[UrlKey]) -> tuple[np.ndarray, np.ndarray]:
        rows, hashes = char_ngram_hashes([k.feature_text for k in keys],
                                         tuple(self.ngram_range), self.seed)
        if self.use_tokens:
            t_rows, t_hashes = token_hashes([k.tokens() for k in keys], self.seed)
            rows = np.concatenate((rows, t_rows))
            hashes = np.concatenate((hashes, t_hashes))
        return rows, columns(hashes, self.n_features)

    def _transform(self, keys: Sequence[UrlKey]) -> sp.csr_matrix:
        """Feature matrix: each hashed occurrence adds ``1 / sqrt(occurrences in the row)``,
        so a column holds its count scaled by the row's size (a long URL does not outvote a
        short one), and a score is one gather-and-sum per URL on the request path."""
        if len(keys) > _CHUNK:  # hash temporaries are ~40 bytes per n-gram: bound them
            return _stack([self._transform(keys[i:i + _CHUNK])
                           for i in range(0, len(keys), _CHUNK)], self.n_features)
        rows, cols = self._hashes(keys)
        n = len(keys)
        per_row = np.bincount(rows, minlength=n)
        scale = 1.0 / np.sqrt(np.maximum(per_row, 1)).astype(np.float32)
        order = np.argsort(rows, kind="stable")
        indptr = np.concatenate(([0], np.cumsum(per_row)))
        return sp.csr_matrix((scale[rows[order]], cols[order], indptr),
                             shape=(n, self.n_features))

    def _prepare(self, items: Sequence[UrlKey]) -> sp.csr_matrix:
        return self._transform(items)

    def _design(self, prepared: sp.csr_matrix, rows: np.ndarray | None
                ) -> tuple[sp.csr_matrix, dict[str, Any]]:
        return prepared, {}  # nothing learned from data but the weights

    def _default_groups(self, items: Sequence[UrlKey]) -> list[str]:
        return [k.registered_domain or k.host for k in items]

    def _group_name(self) -> str:
        return "registered domain"

    def _row_weights(self, y: np.ndarray, n_classes: int,
                     sample_weight: np.ndarray | None) -> np.ndarray | None:
        if not self.class_balance:
            return sample_weight
        freq = np.bincount(y, minlength=n_classes).astype(np.float64)
        per_class = (freq.sum() / np.maximum(freq, 1.0)) ** self.class_balance
        balance = per_class[y] / per_class[y].mean()
        return balance if sample_weight is None else sample_weight * balance

    def _data_digest(self, items: Sequence[UrlKey], labels: list[str]) -> str:
        return data_digest([k.url for k in items], labels)

    # ------------------------------------------------------------------ scoring
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
        top_map = self.top_label_map_
        return z if top_map is None else top_map.apply_one(z)

    # ------------------------------------------------------------------ explanation
    def explain(self, url: str | UrlKey, top: int = 8, classes: Sequence[str] | None = None,
                n_classes: int = 3) -> Explanation:
        """Exact per-feature contributions to the logits of the ``n_classes`` most probable
        classes (or of the named ``classes``): which substrings pushed the verdict where."""
        self._check_fitted()
        key = url if isinstance(url, UrlKey) else normalize(url)
        return self._explain_item(key, key.url, top, classes, n_classes)

    def _explain_terms(self, key: UrlKey) -> tuple[np.ndarray, np.ndarray, list[list[str]]]:
        names = self._feature_names(key)
        _, cols = self._hashes([key])
        uniq, inverse, counts = np.unique(cols, return_inverse=True, return_counts=True)
        values = counts.astype(np.float64) / np.sqrt(max(1, cols.shape[0]))
        labels_for: list[list[str]] = [[] for _ in uniq]
        for pos, u in enumerate(inverse):
            label = names[pos]
            if label not in labels_for[u]:
                labels_for[u].append(label)
        return uniq, values, labels_for

    def _spans(self, key: UrlKey, class_index: int) -> tuple[Span, ...]:
        """Character n-gram contributions to one class logit, merged into spans (``Span``):
        exact, since each n-gram's share is spread over its own characters only."""
        text = key.feature_text.encode("utf-8", "surrogatepass")
        data = b"\x02" + text + b"\x03"
        _, cols = self._hashes([key])
        n_chars = sum(len(data) - n + 1 for n in range(self.ngram_range[0],
                                                       self.ngram_range[1] + 1)
                      if len(data) >= n)
        scale = 1.0 / np.sqrt(max(1, cols.shape[0])) / self.temperature_
        weight = self.weights_[cols[:n_chars], class_index].astype(np.float64) * scale
        per_byte = np.zeros(len(data))
        at = 0
        for n in range(self.ngram_range[0], self.ngram_range[1] + 1):
            starts = len(data) - n + 1
            if starts <= 0:
                continue
            share = weight[at:at + starts] / n
            for j in range(n):
                per_byte[j:j + starts] += share
            at += starts
        # the two boundary marks belong to the first and last real characters
        per_byte[1] += per_byte[0]
        per_byte[-2] += per_byte[-1]
        raw = np.frombuffer(text, dtype=np.uint8)
        # characters, not bytes: a span never cuts a multi-byte character in two
        char_of = np.cumsum((raw & 0xC0) != 0x80) - 1
        chars = text.decode("utf-8", "surrogatepass")
        values = np.bincount(char_of, weights=per_byte[1:-1], minlength=len(chars))
        host_chars = len(f"{key.host_unicode}"
                         f"{':' + str(key.port) if key.port is not None else ''}")
        floor = 0.02 * float(np.abs(values).max(initial=0.0))
        spans: list[Span] = []
        i = 0
        while i < len(values):
            sign = np.sign(values[i]) if abs(values[i]) > floor else 0.0
            j = i + 1
            while j < len(values) and j != host_chars and (
                    np.sign(values[j]) if abs(values[j]) > floor else 0.0) == sign:
                j += 1
            if sign != 0.0:
                spans.append(Span(chars[i:j], "host" if i < host_chars else "path",
                                  float(values[i:j].sum())))
            i = j
        spans.sort(key=lambda sp: -abs(sp.value))
        return tuple(spans)

    def _term_kind(self, names: list[str]) -> str:
        return "token" if all(":" in s and s.split(":", 1)[0] in _PLACES for s in names) \
            else "chars"

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
