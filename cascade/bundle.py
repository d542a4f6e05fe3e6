"""The models trained together, and the one prediction pipeline that uses them.

``ModelBundle`` holds the URL model, the page model, the fusion and the fetch-value model,
and is the only place that turns them into verdicts: URL probabilities, then (where a page
was fetched) extraction, page probabilities and fusion, then one ``Verdict`` per URL with
its stage and reason. The CLI, the demo, the report and ``refine`` all call it.

Training (``fit_bundle``) is stacked: the rows are split into folds by registered domain;
the URL and page models are each fitted with those folds, so each records out-of-fold logits
(on sites it did not see, as in use). Those give each model's temperature and the fusion's
training rows; the final URL and page models are fitted on all rows. So fusion never learns
from predictions on rows a model was fitted on, which would teach it to trust the models too
much. The fetch-value model learns from the same out-of-fold rows.

Directory layout: the URL model's files at the top (so every URL-only command reads the same
directory), ``page/``, ``fusion/`` and ``fetch-value/`` beside them when pages were given.
The fusion records the versions of the two models it was fitted with and is refused beside
any others; so does the fetch-value model.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from sklearn.base import clone

from cascade.errors import ModelFileError
from cascade.fetch_value import MIN_VALUE_ROWS, DomainHistory, FetchValueModel, confidence_gain
from cascade.fuse import Fusion
from cascade.models.explanation import Explanation
from cascade.models.folds import group_folds
from cascade.models.page_model import PageModel, as_pages
from cascade.models.text_features import page_word_count
from cascade.models.url_model import UrlModel, as_keys
from cascade.taxonomy import Taxonomy
from cascade.urls import UrlKey
from cascade.verdict import Reason, Stage, Verdict, fetch_reason, utc_now

__all__ = ["FETCH_VALUE_DIR", "FUSION_DIR", "PAGE_DIR", "BundleExplanation", "ModelBundle",
           "fit_bundle"]

PAGE_DIR = "page"
FUSION_DIR = "fusion"
FETCH_VALUE_DIR = "fetch-value"
_OLD_COST_DIR = "cost"  # written by cascade 0.1 before the fetch-value model was renamed


@dataclass(frozen=True)
class BundleExplanation:
    """Why a bundle decided what it did for one URL: the verdict, the URL model's exact
    contributions and, when a page was given, the page model's and the page's word count."""

    verdict: Verdict
    url_model: Explanation
    page_model: Explanation | None = None
    page_words: int | None = None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {**self.verdict.to_dict(), "url_model": self.url_model.to_dict()}
        if self.page_model is not None:
            out["page_model"] = self.page_model.to_dict()
            out["page_words"] = self.page_words
        return out


@dataclass
class ModelBundle:
    """URL model, and (when trained with pages) page model, fusion and fetch-value model."""

    url_model: UrlModel
    page_model: PageModel | None = None
    fusion: Fusion | None = None
    value_model: FetchValueModel | None = None
    report: dict[str, Any] | None = None
    held_out: dict[str, np.ndarray] | None = field(default=None, repr=False)
    """Out-of-fold predictions from training (``rows``, ``y``, ``url_proba``, ``page_proba``,
    ``page_words``, ``fused_proba``): what the fetch-value model learns from. Not saved."""

    # ------------------------------------------------------------------ identity
    @property
    def classes(self) -> list[str]:
        return list(self.url_model.classes_)

    @property
    def taxonomy(self) -> Taxonomy:
        return self.url_model.taxonomy_

    @property
    def has_pages(self) -> bool:
        """True when a page model and fusion are present (``refine`` can fuse)."""
        return self.page_model is not None and self.fusion is not None

    @property
    def version(self) -> str:
        """The URL model's version, and the page model's when there is one: every verdict
        and every command names the bundle by this one string."""
        if self.page_model is None:
            return self.url_model.version
        return f"{self.url_model.version}+{self.page_model.version}"

    # ------------------------------------------------------------------ files
    def save(self, path: str | Path, metrics: dict[str, Any] | None = None) -> Path:
        """Write the URL model at ``path``, then ``page/``, ``fusion/``, ``fetch-value/``."""
        target = self.url_model.save(path, metrics=metrics)
        if self.page_model is not None and self.fusion is not None:
            self.page_model.save(target / PAGE_DIR)
            self.fusion.save(target / FUSION_DIR, links={"url": self.url_model.version,
                                                         "page": self.page_model.version},
                             metrics=self.report or {})
            if self.value_model is not None:
                self.value_model.save(target / FETCH_VALUE_DIR, links={"bundle": self.version})
        return target

    @classmethod
    def load(cls, path: str | Path) -> ModelBundle:
        """Read a bundle (or a URL-only model directory); every digest is checked."""
        root = Path(path)
        url_model = UrlModel.load(root)
        if not (root / PAGE_DIR).is_dir():
            return cls(url_model)
        page_model = PageModel.load(root / PAGE_DIR)
        fusion = Fusion.load(root / FUSION_DIR)
        expected = {"url": url_model.version, "page": page_model.version}
        if fusion.links_ != expected:
            raise ModelFileError(f"{root / FUSION_DIR}: fitted with models {fusion.links_}, "
                                 f"but the directory holds {expected}; retrain the bundle")
        if page_model.classes_ != url_model.classes_:
            raise ModelFileError(f"{root}: the page and URL models have different classes")
        bundle = cls(url_model, page_model, fusion)
        if (root / FETCH_VALUE_DIR).is_dir():
            value_model = FetchValueModel.load(root / FETCH_VALUE_DIR)
            if value_model.links_ != {"bundle": bundle.version}:
                raise ModelFileError(
                    f"{root / FETCH_VALUE_DIR}: fitted with models {value_model.links_}, but "
                    f"the directory holds {bundle.version}; retrain the bundle")
            bundle.value_model = value_model
        elif (root / _OLD_COST_DIR).is_dir():
            raise ModelFileError(
                f"{root / _OLD_COST_DIR} holds a fetch planner model of an earlier cascade "
                f"release (model format 1, directory 'cost/'); this release reads it from "
                f"'{FETCH_VALUE_DIR}/'. Retrain the bundle with 'cascade train'.")
        return bundle

    # ------------------------------------------------------------------ prediction
    def url_proba(self, urls: Sequence[str | UrlKey]) -> np.ndarray:
        """The URL model's calibrated probabilities, (n, n_classes)."""
        return self.url_model.predict_proba(urls)

    def _page_rows(self, url_proba: np.ndarray, pages: Sequence[Any | None]
                   ) -> tuple[np.ndarray, list[int], np.ndarray]:
        """Fused probabilities where ``pages[i]`` is a page (the URL's elsewhere), the rows
        that had one, and each page's word count (0 where none)."""
        fused = np.array(url_proba, dtype=np.float64, copy=True)
        words = np.zeros(len(pages), dtype=np.int64)
        rows = [i for i, p in enumerate(pages) if p is not None]
        if not rows or not self.has_pages:
            return fused, rows, words
        assert self.page_model is not None and self.fusion is not None
        texts = as_pages([pages[i] for i in rows])
        counts = np.array([page_word_count(p) for p in texts])
        words[rows] = counts
        page_proba = self.page_model.predict_proba(texts)
        fused[rows] = self.fusion.predict_proba(fused[rows], page_proba, counts)
        return fused, rows, words

    def predict_proba(self, urls: Sequence[str | UrlKey], pages: Sequence[Any | None] | None
                      = None, url_proba: np.ndarray | None = None) -> np.ndarray:
        """Calibrated probabilities of each URL: fused with its page where ``pages[i]`` is
        one (a ``PageText``, HTML or text), the URL model's elsewhere and without a page
        model. ``url_proba`` skips rescoring the URLs when the caller has it already."""
        pu = self.url_proba(urls) if url_proba is None else np.asarray(url_proba)
        if pages is None:
            return np.array(pu, dtype=np.float64, copy=True)
        if len(pages) != len(pu):
            raise ValueError(f"{len(pu)} URLs but {len(pages)} pages")
        return self._page_rows(pu, pages)[0]

    def pages_from_fetches(self, results: Sequence[Any | None]) -> list[Any | None]:
        """The extracted page of each successful fetch result (None elsewhere, and
        everywhere when there is no page model to read them)."""
        from cascade.extract import extract_fetch

        pages: list[Any | None] = [None] * len(results)
        if not self.has_pages:
            return pages
        for i, result in enumerate(results):
            if result is not None and result.ok:
                pages[i] = result.page if isinstance(result, _PageResult) else \
                    extract_fetch(result)
        return pages

    def expected_gain(self, url_proba: np.ndarray, domains: Sequence[str] | None = None,
                      history: DomainHistory | None = None,
                      urls: Sequence[str | UrlKey] | None = None) -> dict[str, np.ndarray]:
        """Per URL, what a fetch is expected to save (``gain``, ``p_wrong``, ``p_fix``,
        ``p_break``): from the fetch-value model, or, without one, from confidence alone
        weighted by the taxonomy's costs. ``urls`` (aligned with ``url_proba``) are read by
        a fetch-value model that uses URL shape; pass them always."""
        if self.value_model is not None:
            return self.value_model.expected_gain(url_proba, domains, history, urls=urls)
        return confidence_gain(url_proba, self.taxonomy.costs(self.classes))

    @property
    def planner_name(self) -> str:
        return "fetch-value model" if self.value_model is not None else \
            "confidence (no fetch-value model)"

    def verdicts(
        self,
        urls: Sequence[str | UrlKey],
        *,
        url_proba: np.ndarray | None = None,
        fetches: Mapping[str, Any] | Sequence[Any | None] | None = None,
        plan: Any | None = None,
        fetch_below: float = 0.8,
        top_k: int = 3,
    ) -> list[Verdict]:
        """One verdict per URL, with its stage and ``Reason``; ``plan`` is a ``Plan`` or a
        mapping of normalized URL to the planner's reason.

        ``fetches`` holds fetch results (``FetchResult``), keyed by normalized URL or aligned
        with ``urls`` (None where not fetched). A URL with a result is fused with its page
        (``fused``), or keeps the URL verdict with ``fetch:<outcome>``, ``page:thin`` or
        ``no-page-model``. A URL without one keeps the URL verdict: ``confident`` at or above
        ``fetch_below``, else the plan's reason for leaving it out (``budget:count``, ...),
        ``page:none`` if the plan chose it but no result came, or ``under-threshold``
        without a plan; such URLs keep ``needs_fetch`` when under ``fetch_below``.
        """
        if top_k < 1:
            raise ValueError("top_k must be at least 1")
        keys = as_keys(urls)
        pu = self.url_proba(keys) if url_proba is None else np.asarray(url_proba)
        if len(pu) != len(keys):
            raise ValueError(f"{len(keys)} URLs but {len(pu)} rows of url_proba")
        results = _align_fetches(keys, fetches)
        planned = _plan_reasons(plan)
        fused, _rows, words = self._page_rows(pu, self.pages_from_fetches(results))
        now = utc_now()
        classes = self.classes
        k = min(top_k, len(classes))
        order = np.argsort(-fused, axis=1, kind="stable")[:, :k]
        out = []
        for i, key in enumerate(keys):
            result = results[i]
            conf_url = float(pu[i].max())
            stage, needs = Stage.URL, False
            if result is not None:
                if str(result.outcome) != "ok":
                    reason: str = fetch_reason(result.outcome)
                elif not self.has_pages:
                    reason = Reason.NO_PAGE_MODEL
                elif words[i] < self.fusion.min_page_words:  # type: ignore[union-attr]
                    reason = Reason.PAGE_THIN
                else:
                    stage, reason = Stage.PAGE, Reason.FUSED
            elif conf_url >= fetch_below:
                reason = Reason.CONFIDENT
            else:
                needs = True
                chosen = planned.get(key.url) if planned is not None else None
                if chosen is None:
                    reason = Reason.UNDER_THRESHOLD
                else:
                    reason = Reason.PAGE_NONE if chosen == Reason.SELECTED else chosen
            row = fused[i] if stage is Stage.PAGE else pu[i]
            best = order[i] if stage is Stage.PAGE else np.argsort(-row, kind="stable")[:k]
            out.append(Verdict(
                url=key.url, category=classes[best[0]], confidence=float(row[best[0]]),
                top=tuple((classes[j], float(row[j])) for j in best), stage=stage,
                needs_fetch=needs, reason=reason, model_version=self.version, decided_at=now))
        return out

    def explain(self, url: str | UrlKey, page: Any | None = None, top: int = 8,
                n_classes: int = 2) -> BundleExplanation:
        """The verdict for one URL (fused with ``page`` when given) and the exact
        contributions behind it."""
        key = as_keys([url])[0]
        url_exp = self.url_model.explain(key, top=top, n_classes=n_classes)
        if page is None or not self.has_pages:
            (verdict,) = self.verdicts([key])
            return BundleExplanation(verdict, url_exp)
        assert self.page_model is not None
        (text,) = as_pages([page])
        page_exp = self.page_model.explain(text, top=top, n_classes=n_classes, url=key.url)
        (verdict,) = self.verdicts([key], fetches=[_PageResult(text)])
        return BundleExplanation(verdict, url_exp, page_exp, page_word_count(text))


@dataclass(frozen=True)
class _PageResult:
    """A saved page standing in for a fetch result (``explain --page``)."""

    page: Any
    outcome: str = "ok"
    ok: bool = True


def _align_fetches(keys: Sequence[UrlKey], fetches: Mapping[str, Any] | Sequence[Any | None]
                   | None) -> list[Any | None]:
    if fetches is None:
        return [None] * len(keys)
    if isinstance(fetches, Mapping):
        return [fetches.get(k.url) for k in keys]
    results = list(fetches)
    if len(results) != len(keys):
        raise ValueError(f"{len(keys)} URLs but {len(results)} fetch results")
    return results


def _plan_reasons(plan: Any | None) -> Mapping[str, str] | None:
    """URL to the planner's reason: from a ``Plan``, or a mapping given as it is (the
    batch job overrides the plan's ``selected`` with the budget meter's reason)."""
    if plan is None or isinstance(plan, Mapping):
        return plan
    return {item.url: item.reason for item in plan.items}


# ---------------------------------------------------------------------------- fitting
def fit_bundle(
    urls: Sequence[str | UrlKey],
    labels: Sequence[str],
    pages: Sequence[Any | None],
    taxonomy: Taxonomy | None = None,
    *,
    url_model: UrlModel | None = None,
    page_model: PageModel | None = None,
    fusion: Fusion | None = None,
    value_model: FetchValueModel | None = None,
    folds: int = 4,
    seed: int = 0,
    groups: Sequence[str] | None = None,
    progress: Callable[[str], None] | None = None,
) -> ModelBundle:
    """Fit all four models; ``pages[i]`` is None where row ``i`` has no page.

    ``url_model``, ``page_model``, ``fusion`` and ``value_model`` are unfitted estimators
    whose parameters to use (defaults when None); each is cloned, with ``seed`` and
    ``calibration_folds=folds`` set, so the saved parameters are the ones that fitted it.
    The URL model learns from every row; the page model, fusion and fetch-value model from
    rows with a page. The bundle's ``report`` holds out-of-fold accuracy of each part.
    """
    say = progress or (lambda _msg: None)
    keys = as_keys(urls)
    labels = [str(x) for x in labels]
    if not (len(keys) == len(labels) == len(pages)):
        raise ValueError("urls, labels and pages must have the same length")
    if folds < 2:
        raise ValueError(f"folds must be at least 2 (stacking needs held-out rows), not {folds}")
    taxonomy = taxonomy or Taxonomy.from_labels(labels)
    y = taxonomy.encode(labels)
    page_rows = np.flatnonzero([p is not None for p in pages])
    group_list = list(groups) if groups is not None else \
        [k.registered_domain or k.host for k in keys]
    if len(group_list) != len(keys):
        raise ValueError("groups must hold one group per row")
    fold = group_folds(group_list, folds, seed)
    started = time.perf_counter()
    n = len(keys)
    say(f"URL model on {n} rows ({folds} out-of-fold fits, then all rows)")
    um = clone(url_model if url_model is not None else UrlModel()).set_params(
        calibration_folds=folds, seed=seed)
    um.fit(keys, labels, taxonomy=taxonomy, folds=fold, progress=progress)
    url_oof = um.oof_logits_.astype(np.float64)
    url_seen = ~np.isnan(url_oof[:, 0])
    report: dict[str, Any] = {"folds": folds, "rows": n, "pages": int(page_rows.size)}
    if url_seen.any():
        report["url_oof_accuracy"] = float((url_oof[url_seen].argmax(axis=1) ==
                                            y[url_seen]).mean())
    if page_rows.size < 20:
        report["seconds"] = round(time.perf_counter() - started, 3)
        return ModelBundle(um, report=report)
    page_list = as_pages([pages[i] for i in page_rows])
    say(f"page model on {page_rows.size} pages ({folds} out-of-fold fits, then all pages)")
    pm = clone(page_model if page_model is not None else PageModel()).set_params(
        calibration_folds=folds, seed=seed)
    pm.fit(page_list, [labels[i] for i in page_rows], taxonomy=taxonomy,
           folds=fold[page_rows], progress=progress)
    page_oof = np.full_like(url_oof, np.nan)
    page_oof[page_rows] = pm.oof_logits_
    both = url_seen & ~np.isnan(page_oof[:, 0])
    rows = np.flatnonzero(both)
    pu = um.proba_from_logits(url_oof[both])
    pp = pm.proba_from_logits(page_oof[both])
    page_of = {int(r): p for r, p in zip(page_rows, page_list, strict=True)}
    words = np.array([page_word_count(page_of[int(i)]) for i in rows])
    say(f"fusion on {int(both.sum())} out-of-fold rows")
    fu = clone(fusion if fusion is not None else Fusion())
    fu.fit(pu, pp, y[both], words)
    fused = fu.predict_proba(pu, pp, words)
    report.update({
        "stacked_rows": int(both.sum()),
        "oof_on_page_rows": {
            "url_accuracy": float((pu.argmax(1) == y[both]).mean()),
            "page_accuracy": float((pp.argmax(1) == y[both]).mean()),
            "fused_accuracy": float((fused.argmax(1) == y[both]).mean()),
        } if both.any() else None,
        "temperatures": {"url": um.temperature_, "page": pm.temperature_},
    })
    held_out = {"rows": rows, "y": y[both], "url_proba": pu, "page_proba": pp,
                "page_words": words, "fused_proba": fused}
    vm = None
    if both.sum() >= MIN_VALUE_ROWS:
        say(f"fetch-value model on {int(both.sum())} out-of-fold rows")
        vm = clone(value_model if value_model is not None else FetchValueModel()).set_params(
            seed=seed)
        vm.fit(pu, fused, y[both], costs=taxonomy.costs(),
               domains=[group_list[int(i)] for i in rows],
               urls=[keys[int(i)] for i in rows], page_proba=pp)
        report["fetch_value_model"] = vm.training_
    else:  # e.g. every page on one domain: no out-of-fold rows to learn fetch value from
        report["fetch_value_model"] = (
            f"not fitted: {int(both.sum())} out-of-fold rows with a page (needs "
            f"{MIN_VALUE_ROWS}); the planner ranks by confidence")
    report["seconds"] = round(time.perf_counter() - started, 3)
    return ModelBundle(um, pm, fu, vm, report=report, held_out=held_out)
