"""Training from labelled rows, as ``cascade train`` does it: measure on an honest held-out
split first (by time, then by domain), then fit on every row; a URL model alone, or the whole
bundle when rows have saved pages."""

from __future__ import annotations

import dataclasses
from collections import Counter
from collections.abc import Callable, Sequence
from typing import Any, Literal

from sklearn.base import clone

from cascade.bundle import ModelBundle, fit_bundle
from cascade.errors import TaxonomyError
from cascade.evaluate import evaluate_proba, evaluation_split
from cascade.models.page_model import PageModel
from cascade.models.url_model import UrlModel
from cascade.taxonomy import Taxonomy
from cascade.urls import UrlKey

__all__ = ["LabelCheck", "check_labels", "train"]


@dataclasses.dataclass(frozen=True)
class LabelCheck:
    """What ``check_labels`` found and did: the labels to train on, the taxonomy, and one
    warning line per finding (printed by ``cascade train``)."""

    labels: list[str]
    taxonomy: Taxonomy
    warnings: tuple[str, ...]
    folded: dict[str, str]
    absent: tuple[str, ...]


def check_labels(labels: Sequence[str], taxonomy: Taxonomy | None = None, *,
                 fold_case: bool = False,
                 absent: Literal["keep", "drop"] = "keep") -> LabelCheck:
    """Find the two silent label mistakes before a fit, and apply the user's choice.

    - Labels that differ only in case ("Media sharing" / "Media Sharing") would become two
      categories: warned by name; ``fold_case`` merges each group into the taxonomy's
      spelling (without a taxonomy, the most common spelling).
    - Taxonomy categories with no training row would be kept and never predicted (their
      probability is ~0): warned by name; ``absent="drop"`` leaves them out of the model's
      category set, ``"keep"`` keeps them (a later model trained with rows can learn them).
    """
    if absent not in ("keep", "drop"):
        raise ValueError(f"absent must be 'keep' or 'drop', not {absent!r}")
    labels = [str(v) for v in labels]
    counts = Counter(labels)
    canon: dict[str, str] = {}
    if taxonomy is not None:
        for name in taxonomy.names:
            canon.setdefault(name.casefold(), name)
    groups: dict[str, list[str]] = {}
    for lab in counts:
        groups.setdefault(lab.casefold(), []).append(lab)
    warnings: list[str] = []
    folded: dict[str, str] = {}
    for key, spellings in sorted(groups.items()):
        target = canon.get(key) or max(spellings, key=lambda v: (counts[v], v))
        variants = sorted(set(spellings) | ({target} if key in canon else set()))
        odd = [v for v in spellings if v != target]
        if len(variants) < 2 or not odd:
            continue
        shown = ", ".join(f"{v!r} ({counts.get(v, 0)} rows)" for v in variants)
        if fold_case:
            folded.update({v: target for v in odd})
            warnings.append(f"labels that differ only in case were merged into {target!r}: "
                            f"{shown}")
        else:
            warnings.append(f"labels that differ only in case would be separate categories: "
                            f"{shown}; --fold-case merges them into {target!r}")
    if folded:
        labels = [folded.get(v, v) for v in labels]
        counts = Counter(labels)
    if taxonomy is None:
        taxonomy = Taxonomy.from_labels(labels)
    taxonomy.check_labels(labels)
    missing = tuple(n for n in taxonomy.names if counts.get(n, 0) == 0)
    if missing:
        shown = ", ".join(repr(m) for m in missing)
        if absent == "drop":
            kept = tuple(c for c in taxonomy.categories if c.name not in missing)
            if len(kept) < 2:
                raise TaxonomyError("fewer than two categories have training rows")
            taxonomy = dataclasses.replace(taxonomy, categories=kept)
            warnings.append(f"{len(missing)} categories have no training rows and were left "
                            f"out of the model: {shown}")
        else:
            warnings.append(f"{len(missing)} categories have no training rows; the model keeps "
                            f"them but will never predict them: {shown} (--absent-categories "
                            "drop leaves them out)")
    return LabelCheck(labels, taxonomy, tuple(warnings), folded, missing)


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
    if taxonomy is None:
        # one category set for the held-out measurement and the final fit: a label seen
        # only on the held-out side is then a category the measured model never predicts
        # (its errors count), not a reason to abort
        taxonomy = Taxonomy.from_labels(labels)
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
