"""Shared helpers for the benchmark scripts: data loading, the machine record, JSON output."""

from __future__ import annotations

import csv
import json
import os
import platform
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
SHARED_DATA = Path(os.environ.get("CASCADE_SHARED_DATA", ROOT.parent / "shared" / "data"))


def machine() -> dict:
    import scipy
    import sklearn

    return {
        "cpu_count": os.cpu_count(),
        "platform": platform.platform(),
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "sklearn": sklearn.__version__,
    }


def load_labelled_csv(name: str) -> tuple[list[str], list[str]]:
    """(urls, labels) of a shared data set: 'open-directory-hosts' or 'domain-categories'."""
    files = {"open-directory-hosts": ("hosts.csv", "host"),
             "domain-categories": ("domains.csv", "domain")}
    filename, column = files[name]
    path = SHARED_DATA / name / filename
    if not path.exists():
        raise SystemExit(f"{path} not found: set CASCADE_SHARED_DATA to the shared data folder")
    with path.open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    return [r[column] for r in rows], [r["category"] for r in rows]


def load_webkb_rows() -> tuple[list[dict], int] | None:
    """The shared WebKB page rows whose URL cascade can use, and how many were not (e.g.
    file:// URLs of the 1997 crawl); None when the data set is not here."""
    import gzip

    from cascade.urls import normalize

    path = SHARED_DATA / "university-pages" / "pages.jsonl.gz"
    if not path.exists():
        return None
    rows, skipped = [], 0
    with gzip.open(path, "rt", encoding="utf-8") as fh:
        for line in fh:
            r = json.loads(line)
            try:
                normalize(r["url"])
            except ValueError:
                skipped += 1
                continue
            rows.append(r)
    return rows, skipped


def write_json(result: dict, path: str | None) -> None:
    text = json.dumps(result, indent=2, sort_keys=False)
    print(text)
    if path:
        Path(path).write_text(text + "\n", encoding="utf-8")


def run_child(script: str, *args: str, timeout: float = 1800) -> dict:
    """Run ``script`` in a fresh Python process (its own peak RSS, no shared caches) and
    return the JSON object on the last line it prints."""
    import subprocess

    proc = subprocess.run([sys.executable, script, *args], capture_output=True, text=True,
                          timeout=timeout, check=False)
    if proc.returncode != 0:
        raise SystemExit(f"child {args} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])
