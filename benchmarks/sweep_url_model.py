"""Sweep the URL model's n-gram range, regularization, hashing size and token features.

Each data set is split 80/20 by registered domain (the benchmark's test side, never looked
at here); the 80% is split again 80/20 by domain into fit and validation parts, and every
setting is scored on the validation part. Staged: n-gram range first, then C, then hashing
size, then tokens, each stage keeping the best so far (macro-F1). Writes JSON; the table in
docs/url-model-sweep.md comes from its output.

    python benchmarks/sweep_url_model.py --json sweep.json
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import load_labelled_csv, machine, write_json  # noqa: E402

from cascade.evaluate import evaluation_split  # noqa: E402
from cascade.metrics import accuracy, macro_f1  # noqa: E402
from cascade.models.url_model import UrlModel  # noqa: E402
from cascade.urls import normalize  # noqa: E402


def load(name: str):
    urls, labels = load_labelled_csv(name)
    keys, labs = [], []
    for u, lab in zip(urls, labels, strict=True):
        try:
            keys.append(normalize(u))
            labs.append(lab)
        except ValueError:
            pass
    outer = evaluation_split(keys, test_fraction=0.2, seed=0)
    keys = [keys[i] for i in outer.train]
    labs = [labs[i] for i in outer.train]
    inner = evaluation_split(keys, test_fraction=0.2, seed=1)
    return keys, labs, inner


def score(keys, labs, split, **params) -> dict:
    model = UrlModel(calibration_folds=0, **params)
    tr = [keys[i] for i in split.train]
    started = time.perf_counter()
    model.fit(tr, [labs[i] for i in split.train])
    fit_s = time.perf_counter() - started
    index = {c: i for i, c in enumerate(model.classes_)}
    rows = [i for i in split.test if labs[i] in index]  # a class unseen in fit: left out
    proba = model.predict_proba([keys[i] for i in rows])
    y = np.array([index[labs[i]] for i in rows])
    pred = proba.argmax(axis=1)
    return {"params": {k: (list(v) if isinstance(v, tuple) else v) for k, v in params.items()},
            "macro_f1": round(macro_f1(y, pred, len(model.classes_)), 4),
            "accuracy": round(accuracy(y, pred), 4), "fit_seconds": round(fit_s, 1),
            "used_columns": model.optimizer_["used_columns"]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--datasets", default="open-directory-hosts,domain-categories")
    parser.add_argument("--max-iter", type=int, default=150)
    parser.add_argument("--resume", help="a previous --json output: data sets in it are kept")
    args = parser.parse_args()
    out = {"benchmark": "url-model-sweep", "machine": machine(), "datasets": {}}
    previous = {}
    if args.resume and Path(args.resume).exists():
        previous = json.loads(Path(args.resume).read_text())["datasets"]
    for name in args.datasets.split(","):
        keys, labs, split = load(name)
        done = previous.get(name)
        if done:
            out["datasets"][name] = done
            continue
        best = {"ngram_range": (1, 5), "C": 20.0, "n_features": 2**20, "use_tokens": True,
                "max_iter": args.max_iter}
        rows = []
        stages = [
            ("ngram_range", [(1, 4), (1, 5), (2, 5), (2, 6), (3, 6)]),
            ("C", [5.0, 20.0, 80.0]),
            ("n_features", [2**18, 2**19, 2**20, 2**21]),
            ("use_tokens", [True, False]),
        ]
        seen: dict[str, dict] = {}
        for param, values in stages:
            results = []
            for value in values:
                trial = {**best, param: value}
                key = repr(sorted(trial.items()))
                if key not in seen:
                    seen[key] = score(keys, labs, split, **trial)
                    seen[key]["stage"] = param
                    rows.append(seen[key])
                    print(name, seen[key], file=sys.stderr, flush=True)
                results.append((seen[key]["macro_f1"], value))
            best[param] = max(results, key=lambda r: r[0])[1]
        out["datasets"][name] = {
            "fit_rows": len(split.train), "validation_rows": len(split.test),
            "trials": rows,
            "best": {k: (list(v) if isinstance(v, tuple) else v) for k, v in best.items()},
        }
        if args.json:  # after each data set, so a later failure keeps this one
            Path(args.json).write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    write_json(out, args.json)


if __name__ == "__main__":
    main()
