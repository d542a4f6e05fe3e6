"""Earlier fetch results as the planner's cost history: what fetching from each domain cost
(failures, bytes, seconds). Reads ``cascade fetch`` output and ``cascade refine`` output
(whose fetch figures sit under ``fetch``)."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from cascade.budget import FetchCosts
from cascade.errors import InputFormatError, InvalidURL
from cascade.io import ReadStats, read_records
from cascade.urls import normalize

__all__ = ["history_row", "read_fetch_history"]


def history_row(url: str, fields: dict[str, Any]) -> dict[str, Any]:
    """One cost-history row from a fetch result's fields; ``ValueError`` if it is not one."""
    nested = fields.get("fetch")
    if isinstance(nested, str) and nested.startswith("{"):
        nested = json.loads(nested)  # the reader keeps non-text JSON values as JSON text
    if isinstance(nested, dict):
        fields = {**fields, **nested}
    if "outcome" not in fields or "bytes_read" not in fields or "elapsed_ms" not in fields:
        raise ValueError("not a fetch result (needs outcome, bytes_read, elapsed_ms)")
    nbytes, ms = float(fields["bytes_read"]), float(fields["elapsed_ms"])
    if not (math.isfinite(nbytes) and math.isfinite(ms) and nbytes >= 0 and ms >= 0):
        raise ValueError("bytes_read and elapsed_ms must be finite numbers >= 0")
    key = normalize(url)
    return {"domain": key.registered_domain or key.host,
            "ok": str(fields["outcome"]) == "ok", "bytes": nbytes, "ms": ms}


def read_fetch_history(path: str | Path, stats: ReadStats) -> FetchCosts:
    """Per-domain fetch costs from a JSON Lines file of fetch results. A row that is not a
    fetch result, or has a negative or non-finite figure, is a bad line: counted, sampled,
    skipped. A file with no usable row is an ``InputFormatError``."""
    rows = []
    for rec in read_records(path, fmt="jsonl", stats=stats):
        try:
            rows.append(history_row(rec.url, rec.extra))
        except (InvalidURL, ValueError, TypeError) as exc:
            stats.records -= 1
            stats.add_bad(rec.line_no, rec.url, f"fetch history: {exc}")
    if not rows:
        raise InputFormatError(f"{path}: no usable fetch results (is it 'cascade fetch' or "
                               "'cascade refine' output?)")
    return FetchCosts.from_history(rows)
