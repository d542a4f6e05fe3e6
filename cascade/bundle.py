"""The three models trained together: URL model, page model and fusion, in one directory.

Training (``fit_bundle``) is stacked: the rows are split into folds by registered domain;
for each fold a URL model and a page model are fitted on the other folds and predict it.
Those out-of-fold predictions (on sites neither model saw, as in use) give the temperature
of each model and the fusion's training rows. The final URL and page models are then fitted
on all rows and given those temperatures. So fusion never learns from predictions on rows a
model was fitted on, which would teach it to trust the models too much.

Directory layout: the URL model's files at the top (so every URL-only command reads the same
directory), ``page/`` and ``fusion/`` beside them when pages were given. The fusion records
the versions of the two models it was fitted with and is refused beside any others; so does
the fetch planner's cost model in ``cost/``, fitted on the same out-of-fold rows.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from cascade.budget import MIN_COST_ROWS, CostModel
from cascade.errors import ModelFileError
from cascade.fuse import Fusion
from cascade.models.calibration import fit_temperature, softmax
from cascade.models.folds import group_folds
from cascade.models.page_model import PageModel, as_pages
from cascade.models.text_features import page_word_count
from cascade.models.url_model import UrlModel, as_keys
from cascade.taxonomy import Taxonomy
from cascade.urls import UrlKey
from cascade.verdict import Verdict

PAGE_DIR = "page"
FUSION_DIR = "fusion"
COST_DIR = "cost"


@dataclass
class ModelBundle:
    """What ``cascade refine`` needs; ``page_model``/``fusion`` are None for URL-only."""

    url_model: UrlModel
    page_model: PageModel | None = None
    fusion: Fusion | None = None
    report: dict[str, Any] | None = None
    held_out: dict[str, np.ndarray] | None = None
    """Out-of-fold predictions from training (``rows``, ``y``, ``url_proba``, ``page_proba``,
    ``page_words``, ``fused_proba``): what the fetch planner's cost model learns from.
    Not saved."""
    cost_model: CostModel | None = None

    @property
    def classes(self) -> list[str]:
        return list(self.url_model.classes_)

    @property
    def version(self) -> str:
        if self.page_model is None:
            return self.url_model.version
        return f"{self.url_model.version}+{self.page_model.version}"

    def save(self, path: str | Path, metrics: dict[str, Any] | None = None) -> Path:
        """Write the URL model at ``path``, then ``page/`` and ``fusion/`` inside it."""
        target = self.url_model.save(path, metrics=metrics)
        if self.page_model is not None and self.fusion is not None:
            self.page_model.save(target / PAGE_DIR)
            self.fusion.save(target / FUSION_DIR, links={"url": self.url_model.version,
                                                         "page": self.page_model.version},
                             metrics=self.report or {})
            if self.cost_model is not None:
                self.cost_model.save(target / COST_DIR, links={"bundle": self.version})
        return target

    @classmethod
    def load(cls, path: str | Path) -> ModelBundle:
        """Read a bundle (or a URL-only model directory); every digest is checked."""
        root = Path(path)
        url_model = UrlModel.load(root)
        if not (root / PAGE_DIR).is_dir():
            return cls(url_model)
        page_model = PageModel.load(root / PAGE_DIR)
        fusion, links = Fusion.load(root / FUSION_DIR)
        expected = {"url": url_model.version, "page": page_model.version}
        if links != expected:
            raise ModelFileError(f"{root / FUSION_DIR}: fitted with models {links}, but the "
                                 f"directory holds {expected}; retrain the bundle")
        if page_model.classes_ != url_model.classes_:
            raise ModelFileError(f"{root}: the page and URL models have different classes")
        bundle = cls(url_model, page_model, fusion)
        if (root / COST_DIR).is_dir():
            cost_model, cost_links = CostModel.load(root / COST_DIR)
            if cost_links != {"bundle": bundle.version}:
                raise ModelFileError(f"{root / COST_DIR}: fitted with models {cost_links}, but "
                                     f"the directory holds {bundle.version}; retrain the bundle")
            bundle.cost_model = cost_model
        return bundle


def fit_bundle(
    urls: Sequence[str | UrlKey],
    labels: Sequence[str],
    pages: Sequence[Any | None],
    taxonomy: Taxonomy | None = None,
    url_params: dict[str, Any] | None = None,
    page_params: dict[str, Any] | None = None,
    fusion_params: dict[str, Any] | None = None,
    folds: int = 4,
    seed: int = 0,
    groups: Sequence[str] | None = None,
    progress: Callable[[str], None] | None = None,
) -> ModelBundle:
    """Fit all three models; ``pages[i]`` is None where row ``i`` has no page.

    The URL model learns from every row; the page model and fusion from rows with a page.
    The returned bundle's ``report`` holds out-of-fold accuracy of each part.
    """
    say = progress or (lambda _msg: None)
    keys = as_keys(urls)
    labels = [str(x) for x in labels]
    if not (len(keys) == len(labels) == len(pages)):
        raise ValueError("urls, labels and pages must have the same length")
    taxonomy = taxonomy or Taxonomy.from_labels(labels)
    y = taxonomy.encode(labels)
    classes = list(taxonomy.names)
    has_page = np.array([p is not None for p in pages])
    page_rows = np.flatnonzero(has_page)
    page_list = as_pages([pages[i] for i in page_rows]) if page_rows.size else []
    page_of = {int(r): p for r, p in zip(page_rows, page_list, strict=True)}
    group_list = list(groups) if groups is not None else \
        [k.registered_domain or k.host for k in keys]
    url_kw = {**(url_params or {}), "seed": seed, "calibration_folds": 0}
    page_kw = {**(page_params or {}), "seed": seed, "calibration_folds": 0}
    fold = group_folds(group_list, folds, seed)
    started = time.perf_counter()
    n, k = len(keys), len(classes)
    url_logits = np.full((n, k), np.nan)
    page_logits = np.full((n, k), np.nan)
    for f in range(int(fold.max()) + 1 if fold.size else 0):
        held = fold == f
        train = np.flatnonzero(~held)
        if len(np.unique(y[train])) < 2:
            continue
        say(f"fold {f + 1}/{folds}: URL model on {len(train)} rows")
        um = UrlModel(**url_kw).fit([keys[i] for i in train], [labels[i] for i in train],
                                    taxonomy=taxonomy)
        url_logits[held] = um.decision_function([keys[i] for i in np.flatnonzero(held)])
        p_train = [i for i in train if has_page[i]]
        p_held = [i for i in np.flatnonzero(held) if has_page[i]]
        if len(p_train) >= 2 and p_held and len(np.unique(y[p_train])) >= 2:
            say(f"fold {f + 1}/{folds}: page model on {len(p_train)} pages")
            pm = PageModel(**page_kw).fit([page_of[i] for i in p_train],
                                          [labels[i] for i in p_train], taxonomy=taxonomy,
                                          groups=[group_list[i] for i in p_train])
            page_logits[p_held] = pm.decision_function([page_of[i] for i in p_held])
    url_seen = ~np.isnan(url_logits[:, 0])
    url_t = fit_temperature(url_logits[url_seen], y[url_seen]) if url_seen.any() else 1.0
    say(f"final URL model on {n} rows")
    url_model = UrlModel(**url_kw).fit(keys, labels, taxonomy=taxonomy)
    url_model.temperature_ = url_t
    url_model.calibration_folds = folds  # what the temperature came from
    url_model.training_["calibration"] = (f"temperature fitted on out-of-fold logits, "
                                          f"{folds} folds grouped by registered domain")
    report: dict[str, Any] = {"folds": folds, "rows": n, "pages": int(page_rows.size)}
    if url_seen.any():
        report["url_oof_accuracy"] = float(
            (url_logits[url_seen].argmax(axis=1) == y[url_seen]).mean())
    if page_rows.size < 20:
        report["seconds"] = round(time.perf_counter() - started, 3)
        return ModelBundle(url_model, report=report)
    both = url_seen & ~np.isnan(page_logits[:, 0])
    page_t = fit_temperature(page_logits[both], y[both]) if both.any() else 1.0
    pu = softmax(url_logits[both] / url_t)
    pp = softmax(page_logits[both] / page_t)
    words = np.array([page_word_count(page_of[int(i)]) for i in np.flatnonzero(both)])
    say(f"fusion on {int(both.sum())} out-of-fold rows")
    fusion = Fusion(**(fusion_params or {})).fit(pu, pp, y[both], words)
    fused = fusion.predict_proba(pu, pp, words)
    report.update({
        "stacked_rows": int(both.sum()),
        "oof_on_page_rows": {
            "url_accuracy": float((pu.argmax(1) == y[both]).mean()),
            "page_accuracy": float((pp.argmax(1) == y[both]).mean()),
            "fused_accuracy": float((fused.argmax(1) == y[both]).mean()),
        } if both.any() else None,
        "temperatures": {"url": url_t, "page": page_t},
    })
    say(f"final page model on {page_rows.size} pages")
    page_model = PageModel(**page_kw).fit(page_list, [labels[i] for i in page_rows],
                                          taxonomy=taxonomy,
                                          groups=[group_list[i] for i in page_rows])
    page_model.temperature_ = page_t
    page_model.calibration_folds = folds
    page_model.training_["calibration"] = (f"temperature fitted on out-of-fold logits, "
                                           f"{folds} folds grouped by registered domain")
    report["seconds"] = round(time.perf_counter() - started, 3)
    rows = np.flatnonzero(both)
    held_out = {"rows": rows, "y": y[both], "url_proba": pu, "page_proba": pp,
                "page_words": words, "fused_proba": fused}
    cost_model = None
    if both.sum() >= MIN_COST_ROWS:
        say(f"cost model on {int(both.sum())} out-of-fold rows")
        cost_model = CostModel(seed=seed).fit(pu, fused, y[both], costs=taxonomy.costs(),
                                              domains=[group_list[int(i)] for i in rows])
        report["cost_model"] = cost_model.training_
    else:  # e.g. every page on one domain: no out-of-fold rows to learn fetch value from
        report["cost_model"] = (f"not fitted: {int(both.sum())} out-of-fold rows with a page "
                                f"(needs {MIN_COST_ROWS}); the planner ranks by confidence")
    return ModelBundle(url_model, page_model, fusion, report=report, held_out=held_out,
                       cost_model=cost_model)


def refine_verdict(bundle: ModelBundle, url: str | UrlKey, result: Any | None,
                   top_k: int = 3) -> Verdict:
    """The verdict for one URL after a fetch: fused when the page is usable, else the URL
    model's with the reason kept (``fetch:<outcome>``, ``page:thin``, ``page:none``)."""
    from cascade.extract import extract_fetch

    key = as_keys([url])[0]
    pu = bundle.url_model.predict_proba_one(key)
    outcome = "none" if result is None else str(result.outcome)
    if bundle.page_model is None or bundle.fusion is None:
        row_proba, stage, reason = pu, "url", "no-page-model"
    elif result is None:
        row_proba, stage, reason = pu, "url", "page:none"
    else:
        page = extract_fetch(result)
        pp = bundle.page_model.predict_proba([page])[0] if result.ok else None
        fused = bundle.fusion.combine(pu, pp, page_word_count(page), fetch_outcome=outcome)
        row_proba, stage, reason = fused.proba, fused.stage, fused.reason
    order = np.argsort(-row_proba)[: min(top_k, len(bundle.classes))]
    return Verdict(url=key.url, category=bundle.classes[order[0]],
                   confidence=float(row_proba[order[0]]),
                   top=tuple((bundle.classes[j], float(row_proba[j])) for j in order),
                   stage=stage, needs_fetch=False, reason=reason,
                   model_version=bundle.version)
