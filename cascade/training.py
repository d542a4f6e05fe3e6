"""Training from labelled rows, as ``cascade train`` does it: measure on an honest held-out
split first (by time, then by domain), then fit on every row; a URL model alone, or the whole
bundle when rows have saved pages."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from sklearn.base import clone

from cascade.bundle import ModelBundle, fit_bundle
from cascade.evaluate import evaluate_proba, evaluation_split
from cascade.models.page_model import PageModel
from cascade.models.url_model import UrlModel
from cascade.taxonomy import Taxonomy
from cascade.urls import UrlKey

__all__ = ["train"]


def train(
    keys: Sequence[UrlKey],
    labels: Sequence[str],
    *,
    pages: Sequence[Any | None] | None = None,
    times: Sequence[str | None] | None = None,
    counts: Sequence[float] | None = None,
    taxonomy: Taxonomy | None = None,
    url_model: UrlModel | None = None,
    page_model: PageModel | None = None,
    folds: int = 4,
    holdout: float = 0.2,
    group_by_domain: bool = True,
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
) -> tuple[ModelBundle, dict[str, Any]]:
    """Fit and return ``(bundle, held-out metrics)``; metrics are empty when ``holdout`` is 0.

    The held-out figures come from a URL model fitted on the training side only; the
    returned bundle is then fitted on every row (stacked with pages when any row has one).
    """
    say = progress or (lambda _msg: None)
    template = clone(url_model if url_model is not None else UrlModel()).set_params(seed=seed)
    metrics: dict[str, Any] = {}
    if holdout > 0:
        split = evaluation_split(keys, times, test_fraction=holdout, seed=seed,
                                 group_by_domain=group_by_domain)
        say(f"holding out {len(split.test)} rows ({split.method}) to measure")
        model = clone(template).fit([keys[i] for i in split.train],
                                    [labels[i] for i in split.train], taxonomy=taxonomy,
                                    progress=say)
        if len(split.test):
            metrics = evaluate_proba(model.predict_proba([keys[i] for i in split.test]),
                                     [labels[i] for i in split.test], model.classes_,
                                     counts=None if counts is None else
                                     [counts[i] for i in split.test])
            metrics["split"] = split.describe()
            say(f"held-out accuracy {metrics['accuracy']:.4f}, macro-F1 "
                f"{metrics['macro_f1']:.4f}, ECE {metrics['ece_15']:.4f}")
    n_pages = sum(p is not None for p in pages) if pages is not None else 0
    if n_pages:
        say(f"URL model on {len(keys)} rows, page model and fusion on {n_pages} pages "
            f"(stacked, {folds} folds)")
        bundle = fit_bundle(keys, labels, pages, taxonomy=taxonomy, url_model=template,
                            page_model=page_model, folds=folds, seed=seed, progress=say)
        return bundle, metrics
    say(f"fitting on {len(keys)} rows")
    return ModelBundle(clone(template).fit(keys, labels, taxonomy=taxonomy,
                                           progress=say)), metrics
