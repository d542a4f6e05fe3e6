"""cascade: acceptable-use categories for URLs, a URL model first and a page fetch where it pays.

The public names below are imported lazily (on first use), so ``import cascade`` and the
command line start fast; ``from cascade import UrlModel`` works as usual.
"""

from __future__ import annotations

import importlib
from typing import Any

from cascade.errors import (
    CascadeError,
    DataError,
    InputFormatError,
    InvalidURL,
    ModelFileError,
    NotFittedError,
    StoreError,
    TaxonomyError,
    UsageError,
)

__version__ = "0.1.0"

#: Public name -> the module that defines it.
_LAZY = {
    "UrlModel": "cascade.models.url_model",
    "PageModel": "cascade.models.page_model",
    "Fusion": "cascade.fuse",
    "FetchValueModel": "cascade.fetch_value",
    "DomainHistory": "cascade.fetch_value",
    "ModelBundle": "cascade.bundle",
    "fit_bundle": "cascade.bundle",
    "train": "cascade.training",
    "Budget": "cascade.budget",
    "FetchCosts": "cascade.budget",
    "Plan": "cascade.budget",
    "plan": "cascade.budget",
    "BudgetMeter": "cascade.budget_meter",
    "fetch_within_budget": "cascade.budget_meter",
    "Verdict": "cascade.verdict",
    "VerdictStore": "cascade.store",
    "StorePolicy": "cascade.store",
    "run_night": "cascade.batch",
    "NightOptions": "cascade.batch",
    "PriorShift": "cascade.prior_shift",
    "Triage": "cascade.service",
    "TriagePolicy": "cascade.service",
    "Stage": "cascade.verdict",
    "Reason": "cascade.verdict",
    "Fetcher": "cascade.fetch",
    "SyncFetcher": "cascade.fetch",
    "FetchPolicy": "cascade.fetch",
    "RetryPolicy": "cascade.fetch",
    "FetchResult": "cascade.fetch",
    "FetchOutcome": "cascade.fetch",
    "StaticResolver": "cascade.fetch",
    "SystemResolver": "cascade.fetch",
    "extract": "cascade.extract",
    "extract_fetch": "cascade.extract",
    "PageText": "cascade.extract",
    "Taxonomy": "cascade.taxonomy",
    "load_taxonomy": "cascade.taxonomy",
    "demo_taxonomy": "cascade.taxonomy",
    "normalize": "cascade.urls",
    "UrlKey": "cascade.urls",
    "read_records": "cascade.io",
    "open_writer": "cascade.io",
    "ReadStats": "cascade.io",
    "evaluate_proba": "cascade.evaluate",
    "evaluation_split": "cascade.evaluate",
    "build_report": "cascade.report",
    "write_report": "cascade.report",
}

__all__ = [
    "CascadeError",
    "DataError",
    "InputFormatError",
    "InvalidURL",
    "ModelFileError",
    "NotFittedError",
    "StoreError",
    "TaxonomyError",
    "UsageError",
    "__version__",
    *sorted(_LAZY),
]


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'cascade' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)

