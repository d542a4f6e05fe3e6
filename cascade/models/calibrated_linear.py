"""The one core of the URL model and the page model: a multinomial linear model over hashed
features, with a temperature fitted on out-of-fold logits so its probabilities are honest.

``fit`` owns the whole procedure (labels to class indices through the taxonomy, row weights,
out-of-fold logits on folds that keep a group, e.g. a registered domain, on one side, the
temperature, the final fit on every row); subclasses supply only their features:

- ``_as_items(X)``: the inputs as the model reads them (URL keys, extracted pages);
- ``_prepare(items)``: the label-free, expensive part of featurizing (done once per fit);
- ``_design(prepared, rows)``: the feature matrix of every row, with any state learned from
  data (the page model's idf) learned from ``rows`` only, and that state;
- ``_transform(items)``: the feature matrix at prediction time, from the learned state;
- ``_explain_terms(item)``: the distinct columns of one item, their values and names.

So the out-of-fold logits (``oof_logits_``) come from models that never saw the row nor
learned anything from it, as in use; ``fit_bundle`` stacks the fusion on them.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp
from sklearn.base import BaseEstimator, ClassifierMixin

from cascade.errors import ModelFileError, NotFittedError, TaxonomyError
from cascade.models.calibration import fit_temperature, softmax
from cascade.models.explanation import ClassExplanation, Contribution, Explanation
from cascade.models.folds import group_folds
from cascade.models.linear import compact_table, pack_rows, unpack_rows
from cascade.models.model_files import ModelFileMixin
from cascade.models.params import Constraint, Interval, PowerOfTwo, check_params
from cascade.models.softmax import fit_softmax
from cascade.taxonomy import Taxonomy

__all__ = ["ABSENT_CLASS_BIAS", "CalibratedLinearClassifier"]

#: Intercept of a class with no training rows: never predicted, probability ~0.
ABSENT_CLASS_BIAS = -30.0


class CalibratedLinearClassifier(ModelFileMixin, ClassifierMixin, BaseEstimator):
    """Base class; see the module docstring. Parameters common to every subclass:
    ``n_features``, ``C``, ``max_iter``, ``min_count``, ``calibration_folds``, ``seed``."""

    _param_rules: ClassVar[dict[str, Constraint]] = {
        "n_features": PowerOfTwo(16),
        "C": Interval(0, None, closed="neither"),
        "max_iter": Interval(1, None, integer=True),
        "min_count": Interval(1, None, integer=True),
        "calibration_folds": Interval(0, None, integer=True),
        "seed": Interval(0, 2**63 - 1, integer=True),
    }
    _item_name: ClassVar[str] = "items"  # "URLs", "pages": for error messages

    # ------------------------------------------------------------ subclass hooks
    def _as_items(self, X: Any) -> list[Any]:
        raise NotImplementedError

    def _prepare(self, items: Sequence[Any]) -> Any:
        raise NotImplementedError

    def _design(self, prepared: Any, rows: np.ndarray | None
                ) -> tuple[sp.csr_matrix, dict[str, Any]]:
        raise NotImplementedError

    def _transform(self, items: Sequence[Any]) -> sp.csr_matrix:
        raise NotImplementedError

    def _explain_terms(self, item: Any) -> tuple[np.ndarray, np.ndarray, list[list[str]]]:
        raise NotImplementedError

    def _term_kind(self, names: list[str]) -> str:
        raise NotImplementedError

    def _default_groups(self, items: Sequence[Any]) -> list[str] | None:
        """Calibration groups when ``fit`` is given none (None: every row its own)."""
        return None

    def _row_weights(self, y: np.ndarray, n_classes: int,
                     sample_weight: np.ndarray | None) -> np.ndarray | None:
        return sample_weight

    def _data_digest(self, items: Sequence[Any], labels: list[str]) -> str:
        raise NotImplementedError

    # ------------------------------------------------------------ checks
    def _check_params(self) -> None:
        check_params(self, self._param_rules)

    def _check_fitted(self) -> None:
        if not hasattr(self, "weights_"):
            raise NotFittedError(f"this {type(self).__name__} is not fitted yet: call fit() "
                                 "or load()")

    def transform(self, X: Any) -> sp.csr_matrix:
        """The feature matrix (n, n_features) the weights apply to."""
        self._check_params()
        return self._transform(self._as_items(X))

    # ------------------------------------------------------------ fitting
    def _fit_linear(self, X: sp.csr_matrix, y: np.ndarray, weight: np.ndarray | None,
                    rows: np.ndarray, n_classes: int) -> tuple[np.ndarray, np.ndarray, dict]:
        W, b, info = fit_softmax(X[rows], y[rows], n_classes, C=self.C,
                                 sample_weight=None if weight is None else weight[rows],
                                 max_iter=self.max_iter, min_count=self.min_count)
        b[np.bincount(y[rows], minlength=n_classes) == 0] = ABSENT_CLASS_BIAS
        return W, b, info

    def fit(self, X: Any, y: Sequence[str], *, taxonomy: Taxonomy | None = None,
            sample_weight: Sequence[float] | None = None,
            groups: Sequence[str] | None = None,
            folds: Sequence[int] | np.ndarray | None = None) -> CalibratedLinearClassifier:
        """Learn weights and temperature from labelled items; returns ``self``.

        ``taxonomy`` fixes the category set and column order (labels outside it raise
        ``TaxonomyError``); without it the distinct labels are the categories. ``groups``
        keeps each group on one side of the calibration folds; ``folds`` gives the fold of
        each row directly (-1: never held out), as ``fit_bundle`` does so that the URL and
        page models are held out on the same rows.
        """
        self._check_params()
        started = time.perf_counter()
        items = self._as_items(X)
        labels = [str(v) for v in y]
        n = len(items)
        if n != len(labels):
            raise ValueError(f"{n} {self._item_name} but {len(labels)} labels")
        if n < 2:
            raise ValueError(f"need at least two labelled {self._item_name} to fit")
        taxonomy = taxonomy or Taxonomy.from_labels(labels)
        codes = taxonomy.encode(labels)
        classes = list(taxonomy.names)
        k = len(classes)
        if len(np.unique(codes)) < 2:
            raise TaxonomyError("training labels hold a single category; need at least two")
        weight = None if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
        if weight is not None and weight.shape != (n,):
            raise ValueError(f"sample_weight must hold one number per row ({n})")
        weight = self._row_weights(codes, k, weight)
        if folds is None:
            group_list = list(groups) if groups is not None else self._default_groups(items)
            if group_list is None:
                group_list = [str(i) for i in range(n)]
            if len(group_list) != n:
                raise ValueError(f"{n} {self._item_name} but {len(group_list)} groups")
            fold = group_folds(group_list, self.calibration_folds, self.seed)
        else:
            fold = np.asarray(folds, dtype=np.int64)
            if fold.shape != (n,):
                raise ValueError(f"folds must hold one fold number per row ({n})")
        prepared = self._prepare(items)
        oof = np.full((n, k), np.nan, dtype=np.float32)
        all_rows = np.arange(n)
        used_folds = 0
        for f in range(int(fold.max()) + 1 if fold.size else 0):
            held = fold == f
            train = all_rows[~held]
            if not held.any() or len(np.unique(codes[train])) < 2:
                continue
            Xf, _ = self._design(prepared, train)
            W, b, _info = self._fit_linear(Xf, codes, weight, train, k)
            oof[held] = np.asarray(Xf[held] @ W) + b
            used_folds += 1
        seen = ~np.isnan(oof[:, 0])
        temperature = fit_temperature(oof[seen], codes[seen]) if seen.any() else 1.0
        X_all, state = self._design(prepared, None)
        W, b, info = self._fit_linear(X_all, codes, weight, all_rows, k)
        for name, value in state.items():
            setattr(self, name, value)
        self.classes_ = classes
        self.taxonomy_ = taxonomy
        self.weights_ = np.ascontiguousarray(W)
        self.intercept_ = b
        self.temperature_ = temperature
        self.oof_logits_ = oof
        self.optimizer_ = info
        grouping = "given folds" if folds is not None else (
            "folds grouped by " + ("the given groups" if groups is not None else
                                   self._group_name()))
        self.training_ = {
            "n_rows": n,
            "calibration": f"temperature fitted on out-of-fold logits, {used_folds} "
                           f"{grouping}" if used_folds else "none (temperature 1)",
            "data_sha256": self._data_digest(items, labels),
            "class_counts": {c: int((codes == i).sum()) for i, c in enumerate(classes)},
            "seconds": round(time.perf_counter() - started, 3),
            "seed": self.seed,
            "optimizer": info,
        }
        return self

    def _group_name(self) -> str:
        return "row"

    # ------------------------------------------------------------ scoring
    def _compact_weights(self) -> tuple[np.ndarray, np.ndarray]:
        """The packed weight table (see ``compact_table``), cached per weight array."""
        cached = getattr(self, "_compact", None)
        if cached is not None and cached[2] is self.weights_:
            return cached[0], cached[1]
        row_of, table = compact_table(self.weights_)
        self._compact = (row_of, table, self.weights_)
        return row_of, table

    def decision_function(self, X: Any) -> np.ndarray:
        """Temperature-scaled logits, shape (n, n_classes)."""
        self._check_fitted()
        M = self.transform(X)
        row_of, table = self._compact_weights()
        M = sp.csr_matrix((M.data, row_of[M.indices], M.indptr),
                          shape=(M.shape[0], table.shape[0]))
        return (np.asarray(M @ table, dtype=np.float64) + self.intercept_) / self.temperature_

    def predict_proba(self, X: Any) -> np.ndarray:
        """Calibrated class probabilities, shape (n, n_classes), columns in ``classes_``."""
        return softmax(self.decision_function(X))

    def predict(self, X: Any) -> list[str]:
        """The most probable category of each item."""
        proba = self.predict_proba(X)
        return [self.classes_[i] for i in proba.argmax(axis=1)]

    # ------------------------------------------------------------ explanation
    def _chosen_classes(self, proba: np.ndarray, classes: Sequence[str] | None,
                        n_classes: int) -> list[int]:
        if classes is None:
            return [int(c) for c in np.argsort(-proba)[:n_classes]]
        return [self.classes_.index(self.taxonomy_.names[self.taxonomy_.index(c)])
                for c in classes]

    def _explain_item(self, item: Any, url: str, top: int, classes: Sequence[str] | None,
                      n_classes: int) -> Explanation:
        """Exact per-feature contributions to the logits of the chosen classes."""
        if top < 1 or n_classes < 1:
            raise ValueError("top and n_classes must be at least 1")
        uniq, values, labels_for = self._explain_terms(item)
        per_feature = values[:, None] * self.weights_[uniq].astype(np.float64) / \
            self.temperature_
        bias = self.intercept_ / self.temperature_
        logits = per_feature.sum(axis=0) + bias
        proba = softmax(logits[None, :])[0]
        out, rest = [], []
        for c in self._chosen_classes(proba, classes, n_classes):
            order = np.argsort(-np.abs(per_feature[:, c]), kind="stable")
            shown = order[:top]
            contributions = tuple(
                Contribution(feature=" | ".join(labels_for[i]),
                             kind=self._term_kind(labels_for[i]),
                             value=float(per_feature[i, c]))
                for i in shown)
            rest.append(float(per_feature[order[top:], c].sum()))
            out.append(ClassExplanation(self.classes_[c], float(proba[c]), float(logits[c]),
                                        float(bias[c]), contributions))
        return Explanation(url, tuple(out), tuple(rest))

    # ------------------------------------------------------------ files
    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        meta = {"classes": list(self.classes_), "taxonomy": self.taxonomy_.to_dict(),
                "calibration": {"method": "temperature", "temperature": self.temperature_},
                "training": self.training_}
        arrays = {**pack_rows(self.weights_), "intercept": self.intercept_.astype(np.float64)}
        return meta, arrays

    def _restore_state(self, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                       where: str) -> None:
        classes = [str(c) for c in meta["classes"]]
        intercept = arrays["intercept"]
        if intercept.shape != (len(classes),):
            raise ModelFileError(f"{where}: array shapes do not match the class list")
        self.weights_ = unpack_rows(arrays, self.n_features, len(classes), where)
        self.classes_ = classes
        self.taxonomy_ = Taxonomy.from_dict(meta["taxonomy"])
        if list(self.taxonomy_.names) != classes:
            raise ModelFileError(f"{where}: the class list does not match the taxonomy")
        self.intercept_ = intercept.astype(np.float64)
        self.temperature_ = float(meta["calibration"]["temperature"])
        if not self.temperature_ > 0:
            raise ModelFileError(f"{where}: temperature must be positive")
