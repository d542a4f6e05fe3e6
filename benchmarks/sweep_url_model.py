"""Choose the URL model's defaults by cross-validation inside the training rows.

Each data set is split 80/20 by registered domain (the benchmark's test side, never looked
at here). The 80% is cut into ``--folds`` folds by registered domain (whole domains to a
fold, as in use: the URLs a filter meets tomorrow are mostly on domains it has not seen);
every setting of the grid is fitted on all folds but one and scored on the one left out,
and its score is the mean over folds. Figures per setting: macro-F1 (the choice), accuracy
and log loss, with the spread over folds. The setting chosen for the defaults is the one
with the best mean rank over the data sets, so no single data set decides.

    python benchmarks/sweep_url_model.py --json docs/measurements/url-model-sweep.json
"""

from __future__ import annotations

import argparse
import itertools
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import load_labelled_csv, machine, write_json  # noqa: E402
from sklearn.metrics import log_loss  # noqa: E402

from cascade.evaluate import evaluation_split  # noqa: E402
from cascade.metrics import accuracy, macro_f1  # noqa: E402
from cascade.models.folds import group_folds  # noqa: E402
from cascade.models.url_model import UrlModel  # noqa: E402
from cascade.scenario import generate_telemetry  # noqa: E402
from cascade.taxonomy import Taxonomy  # noqa: E402
from cascade.urls import normalize  # noqa: E402


def load(name: str, seed: int):
    if name == "demo-scenario":
        records = generate_telemetry(seed=0)
        urls, labels = [r.url for r in records], [r.label for r in records]
    else:
        urls, labels = load_labelled_csv(name)
    keys, labs = [], []
    for u, lab in zip(urls, labels, strict=True):
        try:
            keys.append(normalize(u))
            labs.append(lab)
        except ValueError:
            pass
    outer = evaluation_split(keys, test_fraction=0.2, seed=0)
    return [keys[i] for i in outer.train], [labs[i] for i in outer.train]


def cross_validate(keys, labs, fold, params: dict) -> dict:
    taxonomy = Taxonomy.from_labels(labs)
    y_all = np.array(taxonomy.encode(labs))
    scores = {"macro_f1": [], "accuracy": [], "log_loss": [], "iterations": []}
    started = time.perf_counter()
    for f in range(int(fold.max()) + 1):
        train = np.flatnonzero(fold != f)
        test = np.flatnonzero(fold == f)
        model = UrlModel(calibration_folds=0, **params)
        model.fit([keys[i] for i in train], [labs[i] for i in train], taxonomy=taxonomy)
        proba = model.predict_proba([keys[i] for i in test])
        y, pred = y_all[test], proba.argmax(axis=1)
        scores["macro_f1"].append(macro_f1(y, pred, len(taxonomy.names)))
        scores["accuracy"].append(accuracy(y, pred))
        scores["log_loss"].append(log_loss(y, proba, labels=np.arange(len(taxonomy.names))))
        scores["iterations"].append(model.optimizer_["iterations"])
    out = {"params": {k: (list(v) if isinstance(v, tuple) else v) for k, v in params.items()}}
    for name, values in scores.items():
        out[name] = round(float(np.mean(values)), 4)
        if name != "iterations":
            out[name + "_sd"] = round(float(np.std(values)), 4)
    out["seconds"] = round(time.perf_counter() - started, 1)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--datasets",
                        default="open-directory-hosts,domain-categories,demo-scenario")
    parser.add_argument("--folds", type=int, default=3)
    parser.add_argument("--ngrams", default="1-4,2-5,3-6")
    parser.add_argument("--C", default="2,5,20")
    parser.add_argument("--class-balance", default="0,0.5")
    parser.add_argument("--min-count", default="2")
    parser.add_argument("--tol", type=float, default=1e-4)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    ngrams = [tuple(int(x) for x in g.split("-")) for g in args.ngrams.split(",")]
    grid = [{"ngram_range": g, "C": float(c), "class_balance": float(cb),
             "min_count": int(mc), "tol": args.tol}
            for g, c, cb, mc in itertools.product(ngrams, args.C.split(","),
                                                  args.class_balance.split(","),
                                                  args.min_count.split(","))]
    out = {"benchmark": "url-model-sweep", "machine": machine(), "folds": args.folds,
           "procedure": "grouped (registered domain) k-fold CV inside the 80% training side",
           "datasets": {}}
    for name in args.datasets.split(","):
        keys, labs = load(name, args.seed)
        fold = group_folds([k.registered_domain or k.host for k in keys], args.folds,
                           args.seed)
        trials = []
        for params in grid:
            trial = cross_validate(keys, labs, fold, params)
            trials.append(trial)
            print(name, json.dumps(trial), file=sys.stderr, flush=True)
        out["datasets"][name] = {"rows": len(keys), "trials": trials}
        if args.json:  # after each data set, so a later failure keeps this one
            Path(args.json).write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    # best mean rank over data sets (rank 1 = best macro-F1 on that set)
    ranks = np.zeros(len(grid))
    for result in out["datasets"].values():
        f1 = np.array([t["macro_f1"] for t in result["trials"]])
        ranks += (-f1).argsort().argsort() + 1
    ranks /= max(1, len(out["datasets"]))
    best = int(ranks.argmin())
    out["mean_rank"] = [{"params": out["datasets"][next(iter(out["datasets"]))]["trials"][i]
                         ["params"], "mean_rank": round(float(r), 2)}
                        for i, r in enumerate(ranks)]
    out["chosen"] = out["mean_rank"][best]
    write_json(out, args.json)


if __name__ == "__main__":
    main()
