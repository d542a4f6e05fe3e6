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
import warnings
from collections.abc import Callable, Sequence
from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.exceptions import ConvergenceWarning

from cascade.errors import ModelFileError, NotFittedError, TaxonomyError
from cascade.models.calibration import TopLabelMap, fit_temperature, softmax
from cascade.models.explanation import ClassExplanation, Contribution, Explanation
from cascade.models.folds import group_folds
from cascade.models.linear import compact_table, pack_rows, unpack_rows
from cascade.models.model_files import ModelFileMixin
from cascade.models.params import Constraint, Interval, OneOf, PowerOfTwo, check_params
from cascade.models.softmax import FitProgress, compact_columns, fit_softmax
from cascade.taxonomy import Taxonomy

__all__ = ["ABSENT_CLASS_BIAS", "CalibratedLinearClassifier"]

#: Intercept of a class with no training rows: never predicted, probability ~0.
ABSENT_CLASS_BIAS = -30.0


class CalibratedLinearClassifier(ModelFileMixin, ClassifierMixin, BaseEstimator):
    """Base class; see the module docstring. Parameters common to every subclass:
    ``n_features``, ``C``, ``tol``, ``max_iter``, ``min_count``, ``calibration``,
    ``calibration_folds``, ``calibration_rows``, ``n_jobs``, ``seed``."""

    _param_rules: ClassVar[dict[str, Constraint]] = {
        "n_features": PowerOfTwo(16),
        "C": Interval(0, None, closed="neither"),
        "tol": Interval(0, None, closed="neither"),
        "max_iter": Interval(1, None, integer=True),
        "n_jobs": OneOf(test=lambda v: v is None or (isinstance(v, int)
                                                     and not isinstance(v, bool) and v != 0),
                        text="None or a non-zero whole number (-1: all cores)"),
        "min_count": Interval(1, None, integer=True),
        "calibration": OneOf(("temperature", "top-label")),
        "calibration_folds": Interval(0, None, integer=True),
        "calibration_rows": OneOf(test=lambda v: v is None or (
            isinstance(v, int) and not isinstance(v, bool) and v >= 1),
            text="None or a whole number of at least 1"),
        "seed": Interval(0, 2**63 - 1, integer=True),
    }
    _item_name: ClassVar[str] = "items"  # "URLs", "pages": for error messages
    # the design matrix does not depend on the rows (no state learned from data): its
    # columns are compacted once, in place, for all fits (``compact_columns``)
    _fixed_design: ClassVar[bool] = False

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

    def _spans(self, item: Any, class_index: int) -> tuple:
        """Readable spans of the item's text and their share of one class logit (the URL
        model's; none by default)."""
        return ()

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
                    rows: np.ndarray, n_classes: int,
                    init: tuple[np.ndarray, np.ndarray] | None = None,
                    progress: Callable[[FitProgress], None] | None = None
                    ) -> tuple[np.ndarray, np.ndarray, dict]:
        W, b, info = fit_softmax(X, y, n_classes, C=self.C, sample_weight=weight,
                                 max_iter=self.max_iter, tol=self.tol,
                                 min_count=0 if self._fixed_design else self.min_count,
                                 init=init, n_jobs=self.n_jobs,
                                 progress=progress, rows=rows)
        b[np.bincount(y[rows], minlength=n_classes) == 0] = ABSENT_CLASS_BIAS
        return W, b, info

    def fit(self, X: Any, y: Sequence[str], *, taxonomy: Taxonomy | None = None,
            sample_weight: Sequence[float] | None = None,
            groups: Sequence[str] | None = None,
            folds: Sequence[int] | np.ndarray | None = None,
            progress: Callable[[str], None] | None = None) -> CalibratedLinearClassifier:
        """Learn weights and temperature from labelled items; returns ``self``.

        ``taxonomy`` fixes the category set and column order (labels outside it raise
        ``TaxonomyError``); without it the distinct labels are the categories. ``groups``
        keeps each group on one side of the calibration folds; ``folds`` gives the fold of
        each row directly (-1: never held out), as ``fit_bundle`` does so that the URL and
        page models are held out on the same rows. ``progress`` receives a line every few
        seconds: which fit, iteration, rate, gradient against its target, time left.

        Every fit runs to convergence (largest gradient component below ``tol``). The
        calibration folds start from zero and the final fit from their mean (a strictly
        convex problem has one optimum, so the start only changes how fast it is reached).
        Starting a fold from the previous fold's solution was measured slower than from
        zero on the open-directory hosts (37 iterations against 23 for the second fold,
        19.4 s against 12.4 s for the whole fit): that solution is fitted to the rows the
        next fold holds out, and undoing it costs more than it saves.
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
            del group_list
        else:
            fold = np.asarray(folds, dtype=np.int64)
            if fold.shape != (n,):
                raise ValueError(f"folds must hold one fold number per row ({n})")
        # Work in fold order (each fold's rows contiguous, order kept inside a fold): a
        # fold's training side is then two runs of rows, which the solver reads in place
        # instead of copying them (at a million URLs, a copy is gigabytes).
        order = np.argsort(fold, kind="stable")
        fold, codes = fold[order], codes[order]
        weight = None if weight is None else weight[order]
        prepared = self._prepare([items[i] for i in order])
        # the items are not needed past featurizing: let them go (at a million URLs the
        # normalized keys made from given strings are most of a gigabyte)
        digest = self._data_digest(items, labels)
        del items
        used_columns = None
        if self._fixed_design:
            prepared, used_columns = compact_columns(prepared, self.min_count)
        oof = np.full((n, k), np.nan, dtype=np.float32)
        all_rows = np.arange(n)
        used_folds = 0
        fold_ids = [f for f in range(int(fold.max()) + 1 if fold.size else 0)
                    if (fold == f).any() and len(np.unique(codes[fold != f])) >= 2]
        if folds is None and self.calibration_rows is not None:
            # enough held-out rows for one temperature: skip the remaining folds
            kept, held_out = [], 0
            for f in fold_ids:
                if held_out >= self.calibration_rows:
                    break
                kept.append(f)
                held_out += int((fold == f).sum())
            fold_ids = kept
        meter = _FitMeter(progress, type(self).__name__, len(fold_ids) + 1)
        start: tuple[np.ndarray, np.ndarray] | None = None  # running sum of fold solutions
        fold_info = []
        for f in fold_ids:
            lo, hi = np.searchsorted(fold, [f, f + 1])  # the fold's run of rows
            train = np.concatenate((all_rows[:lo], all_rows[hi:]))
            Xf, _ = self._design(prepared, train)
            W, b, finfo = self._fit_linear(Xf, codes, weight, train, k,
                                           progress=meter.step(f"calibration fold "
                                                               f"{used_folds + 1}"))
            for a in range(lo, hi, 65_536):  # bounded temporaries
                z = min(hi, a + 65_536)
                oof[a:z] = np.asarray(Xf[a:z] @ W) + b
            used_folds += 1
            if start is None:
                start = (W, b)
            else:
                start[0][...] += W  # in place: one table for the running sum
                start = (start[0], start[1] + b)
            del W
            fold_info.append({key: finfo[key] for key in ("iterations", "converged",
                                                          "seconds")})
        seen = ~np.isnan(oof[:, 0])
        temperature = fit_temperature(oof[seen], codes[seen]) if seen.any() else 1.0
        top_map = None
        if self.calibration == "top-label" and seen.any():
            top_map = TopLabelMap.fit(softmax(oof[seen] / np.float32(temperature)),
                                      codes[seen])
        unsorted = np.empty_like(oof)
        unsorted[order] = oof
        oof = unsorted
        X_all, state = self._design(prepared, None)
        if start is not None:  # the mean of the fold solutions
            start[0][...] /= np.float32(used_folds)  # in place: no second table
            start = (start[0], start[1] / used_folds)
        W, b, info = self._fit_linear(X_all, codes, weight, all_rows, k, init=start,
                                      progress=meter.step("final fit"))
        info = {**info, "calibration_fits": fold_info}
        meter.done()
        if not info["converged"]:
            warnings.warn(f"{type(self).__name__}: the solver stopped at max_iter="
                          f"{self.max_iter} before converging (largest gradient "
                          f"{info['gradient_max']:.2g}, target tol={self.tol:g}); raise "
                          "max_iter or lower C", ConvergenceWarning, stacklevel=2)
        for name, value in state.items():
            setattr(self, name, value)
        self.classes_ = classes
        self.taxonomy_ = taxonomy
        if used_columns is not None:  # back to the full hashing width
            full = np.zeros((self.n_features, k), dtype=np.float32)
            full[used_columns] = W[:len(used_columns)]
            W = full
            info["used_columns"] = int(len(used_columns))
        self.weights_ = np.ascontiguousarray(W)
        self.intercept_ = b
        self.temperature_ = temperature
        self.top_label_map_ = top_map
        self.oof_logits_ = oof
        self.optimizer_ = info
        grouping = "given folds" if folds is not None else (
            "folds grouped by " + ("the given groups" if groups is not None else
                                   self._group_name()))
        self.training_ = {
            "n_rows": n,
            "calibration": (f"temperature fitted on out-of-fold logits, {used_folds} "
                            f"{grouping}" + (", then a top-label map" if top_map else "")
                            if used_folds else "none (temperature 1)"),
            "data_sha256": digest,
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
        return self._calibrated(softmax(self.decision_function(X)))

    def proba_from_logits(self, logits: np.ndarray) -> np.ndarray:
        """Calibrated probabilities from raw logits (``X @ W + b``, before the temperature,
        as in ``oof_logits_``): what ``predict_proba`` gives for those rows. ``fit_bundle``
        reads the out-of-fold logits through it, so the fusion learns on what it will see."""
        self._check_fitted()
        z = np.asarray(logits, dtype=np.float64) / self.temperature_
        return self._calibrated(softmax(z))

    def _calibrated(self, proba: np.ndarray) -> np.ndarray:
        """The top-label map over temperature-scaled probabilities (in place), if fitted."""
        top_map = self.top_label_map_
        return proba if top_map is None else top_map.apply(proba)

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
        proba = self._calibrated(softmax(logits[None, :]))[0]
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
                                        float(bias[c]), contributions,
                                        self._spans(item, c)))
        return Explanation(url, tuple(out), tuple(rest))

    # ------------------------------------------------------------ files
    def _file_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        top_map = self.top_label_map_
        method = "temperature" if top_map is None else "temperature+top-label"
        meta = {"classes": list(self.classes_), "taxonomy": self.taxonomy_.to_dict(),
                "calibration": {"method": method, "temperature": self.temperature_},
                "training": self.training_}
        arrays = {**pack_rows(self.weights_), "intercept": self.intercept_.astype(np.float64)}
        if top_map is not None:
            arrays.update(top_label_x=top_map.xs, top_label_y=top_map.ys)
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
        method = meta["calibration"].get("method", "temperature")
        if method == "temperature":  # fitted without a map (or with too few rows for one)
            self.top_label_map_ = None
        elif method == "temperature+top-label":
            if "top_label_x" not in arrays or "top_label_y" not in arrays:
                raise ModelFileError(f"{where}: the calibration says top-label but "
                                     "weights.npz has no top-label knots")
            try:
                self.top_label_map_ = TopLabelMap(arrays["top_label_x"], arrays["top_label_y"])
            except ValueError as exc:
                raise ModelFileError(f"{where}: {exc}") from None
        else:
            raise ModelFileError(f"{where}: unknown calibration method {method!r}")


class _FitMeter:
    """Turns solver iterations into a progress line every ``every_s`` seconds: which of the
    ``fits`` runs, its iteration and rate, its gradient against the target, time left."""

    every_s: ClassVar[float] = 2.0

    def __init__(self, say: Callable[[str], None] | None, name: str, fits: int) -> None:
        self.say, self.name, self.fits = say, name, fits
        self.started = time.perf_counter()
        self.fit_seconds: list[float] = []
        self.index = 0
        self.last = 0.0

    def step(self, label: str) -> Callable[[FitProgress], None] | None:
        if self.say is None:
            return None
        self.index += 1
        fit_started = time.perf_counter()
        if self.index > 1:
            self.fit_seconds.append(fit_started - self._fit_started)
        self._fit_started = fit_started
        index, say = self.index, self.say

        def report(p: FitProgress) -> None:
            now = time.perf_counter()
            if now - self.last < self.every_s:
                return
            self.last = now
            rate = p.iteration / max(p.seconds, 1e-9)
            later = self.fits - index  # fits after this one, guessed at the mean so far
            mean_fit = (sum(self.fit_seconds) / len(self.fit_seconds)
                        if self.fit_seconds else p.seconds + (p.eta_s or 0.0))
            eta = None if p.eta_s is None else p.eta_s + later * mean_fit
            left = "estimating time left" if eta is None else f"about {eta:.0f} s left"
            say(f"{self.name} fit {index} of {self.fits} ({label}): iteration {p.iteration},"
                f" {rate:.1f} it/s, gradient {p.gradient:.1e} (target {p.tol:.0e}), {left}")
        return report

    def done(self) -> None:
        if self.say is not None:
            self.say(f"{self.name}: {self.fits} fits in "
                     f"{time.perf_counter() - self.started:.1f} s")
