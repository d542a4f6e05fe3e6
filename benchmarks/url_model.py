"""URL model against its peers, in one run on one machine: accuracy and speed.

Peers: fastText's supervised classifier (character subwords, minn 3 / maxn 6) trained on
the same split, and two plain scikit-learn pipelines (HashingVectorizer over character
3-6-grams, and over word-bounded 1-5-grams, + an SGD-trained linear model). Every system's
training seconds are measured in the same run; the ratios are ours over the best peer.
Data: the shared open-directory hosts and domain categories
(fixed 80/20 split by registered domain, seed 0) and the invented demo scenario (split by
time, new domains only on the test side).

Figures: accuracy and macro-F1 on the test side; batch throughput (URLs/s, one call over
the whole test side, best of 3); single-URL latency p50/p99 (one call per URL); our model
file's size. Our figures include URL normalization (the peers get the raw string, as they
would in use).

    python benchmarks/url_model.py --json url_model.json
"""

from __future__ import annotations

import argparse
import re
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import load_labelled_csv, machine, write_json  # noqa: E402

from cascade.evaluate import evaluation_split  # noqa: E402
from cascade.metrics import accuracy, expected_calibration_error, macro_f1  # noqa: E402
from cascade.models.url_model import UrlModel  # noqa: E402
from cascade.scenario import generate_telemetry  # noqa: E402
from cascade.taxonomy import demo_taxonomy  # noqa: E402
from cascade.urls import normalize  # noqa: E402

_SPLIT_WORDS = re.compile(r"[^0-9A-Za-z\u00c0-\uffff]+")


def _data(name: str):
    if name == "demo-scenario":
        records = generate_telemetry(seed=0)
        raw = [r.url for r in records]
        labels = [r.label for r in records]
        times = [r.seen_at for r in records]
    else:
        raw, labels = load_labelled_csv(name)
        times = None
    keep = []
    keys = []
    for i, u in enumerate(raw):
        try:
            keys.append(normalize(u))
            keep.append(i)
        except ValueError:
            pass
    raw = [raw[i] for i in keep]
    labels = [labels[i] for i in keep]
    times = None if times is None else [times[i] for i in keep]
    split = evaluation_split(keys, times, test_fraction=0.2, seed=0)
    return raw, labels, split


def _best_of(fn, repeats: int = 3) -> float:
    best = float("inf")
    for _ in range(repeats):
        started = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - started)
    return best


def _latency(fn, items: list[str], n: int = 2000) -> dict:
    items = (items * (n // max(1, len(items)) + 1))[:n]
    for x in items[:100]:
        fn(x)
    samples = np.empty(len(items))
    for i, x in enumerate(items):
        started = time.perf_counter_ns()
        fn(x)
        samples[i] = (time.perf_counter_ns() - started) / 1000.0
    return {"p50_us": round(float(np.percentile(samples, 50)), 1),
            "p99_us": round(float(np.percentile(samples, 99)), 1),
            "single_per_s": round(float(1e6 / samples.mean()), 0)}


def _scores(y_true: list[str], y_pred: list[str], classes: list[str]) -> dict:
    index = {c: i for i, c in enumerate(classes)}
    yt = np.array([index[c] for c in y_true])
    yp = np.array([index.get(c, 0) for c in y_pred])
    return {"accuracy": round(accuracy(yt, yp), 4),
            "macro_f1": round(macro_f1(yt, yp, len(classes)), 4)}


def run_ours(train, ytrain, test, ytest, taxonomy, params) -> dict:
    started = time.perf_counter()
    model = UrlModel(**params).fit(train, ytrain, taxonomy=taxonomy)
    fit_s = time.perf_counter() - started
    out = {"fit_seconds": round(fit_s, 1), "temperature": round(model.temperature_, 4)}
    proba = model.predict_proba(test)
    out.update(_scores(ytest, [model.classes_[i] for i in proba.argmax(axis=1)], model.classes_))
    index = {c: i for i, c in enumerate(model.classes_)}
    known = [i for i, c in enumerate(ytest) if c in index]
    out["ece_15"] = round(expected_calibration_error(
        np.array([index[ytest[i]] for i in known]), proba[known]), 4)
    secs = _best_of(lambda: model.predict_proba(test))
    out["batch_per_s"] = round(len(test) / secs, 0)
    out.update(_latency(model.predict_proba_one, test))
    with tempfile.TemporaryDirectory() as tmp:
        path = model.save(Path(tmp) / "m")
        out["model_file_bytes"] = sum(p.stat().st_size for p in path.iterdir())
    return out


def _ft_text(url: str) -> str:
    return " ".join(w for w in _SPLIT_WORDS.split(url.lower()) if w)


def _ft_train(fasttext, rows, path: Path, **kwargs):
    with path.open("w", encoding="utf-8") as fh:
        for u, y in rows:
            fh.write(f"__label__{y} {_ft_text(u)}\n")
    return fasttext.train_supervised(input=str(path), verbose=0, **kwargs)


def run_fasttext(train, ytrain, test, ytest, classes, seed: int, autotune_s: int) -> dict:
    """fastText with character subwords; with ``autotune_s`` > 0 its own autotune picks the
    settings on a validation part of the training side (by domain), then it is refitted on
    the whole training side with them, as our model's settings were chosen by a sweep."""
    try:
        import fasttext
    except ImportError:
        return {"skipped": "fasttext not installed (pip install -e '.[bench]')"}
    rows = list(zip(train, ytrain, strict=True))
    with tempfile.TemporaryDirectory() as tmp:
        settings = dict(minn=3, maxn=6, dim=100, epoch=25, lr=0.5, wordNgrams=1)
        tuned = False
        if autotune_s > 0:
            keys = [normalize(u) for u in train]
            inner = evaluation_split(keys, None, test_fraction=0.2, seed=1)
            fit_rows = [rows[i] for i in inner.train]
            val_rows = [rows[i] for i in inner.test]
            val_path = Path(tmp) / "val.txt"
            with val_path.open("w", encoding="utf-8") as fh:
                for u, y in val_rows:
                    fh.write(f"__label__{y} {_ft_text(u)}\n")
            try:
                probe = _ft_train(fasttext, fit_rows, Path(tmp) / "fit.txt",
                                  autotuneValidationFile=str(val_path),
                                  autotuneDuration=autotune_s, thread=1, seed=seed)
                a = probe.f.getArgs()
                settings = dict(minn=a.minn, maxn=a.maxn, dim=a.dim, epoch=a.epoch, lr=a.lr,
                                wordNgrams=a.wordNgrams, bucket=a.bucket)
                tuned = True
            except RuntimeError as exc:  # autotune itself can diverge ("Encountered NaN")
                tuned = f"autotune failed ({exc}); fixed settings used"
        started = time.perf_counter()
        for _ in range(4):  # autotune's learning rate can diverge on all rows: halve it
            try:
                model = _ft_train(fasttext, rows, Path(tmp) / "train.txt", thread=1,
                                  seed=seed, **settings)
                break
            except RuntimeError as exc:  # fastText: "Encountered NaN."
                settings["lr"] = settings["lr"] / 2
                settings["lr_halved_after"] = str(exc)
                settings.pop("lr_halved_after")
                tuned = f"autotuned, lr halved to {settings['lr']:.4f} after a NaN"
        fit_s = time.perf_counter() - started
    texts = [_ft_text(u) for u in test]
    labels, _ = model.predict(texts, k=1)
    pred = [lab[0].replace("__label__", "") for lab in labels]
    out = {"fit_seconds": round(fit_s, 1), "autotuned": tuned,
           "settings": {k: (round(v, 4) if isinstance(v, float) else v)
                        for k, v in settings.items()}}
    out.update(_scores(ytest, pred, classes))
    # the peer's own tokenization (lowercase, split on punctuation) is part of its cost
    secs = _best_of(lambda: model.predict([_ft_text(u) for u in test], k=1))
    out["batch_per_s"] = round(len(test) / secs, 0)
    out.update(_latency(lambda u: model.predict(_ft_text(u), k=1), test))
    return out


def run_sklearn(train, ytrain, test, ytest, classes, seed: int, analyzer: str = "char",
                ngram_range: tuple[int, int] = (3, 6)) -> dict:
    from sklearn.feature_extraction.text import HashingVectorizer
    from sklearn.linear_model import SGDClassifier
    from sklearn.pipeline import make_pipeline

    pipe = make_pipeline(
        HashingVectorizer(analyzer=analyzer, ngram_range=ngram_range, n_features=2**20),
        SGDClassifier(loss="log_loss", alpha=1e-5, max_iter=30, tol=None, random_state=seed),
    )
    started = time.perf_counter()
    pipe.fit(train, ytrain)
    fit_s = time.perf_counter() - started
    out = {"fit_seconds": round(fit_s, 1),
           "settings": f"HashingVectorizer({analyzer}, {ngram_range[0]}-{ngram_range[1]}, "
                       "2**20) + SGDClassifier(log_loss, alpha=1e-5, 30 epochs)"}
    out.update(_scores(ytest, list(pipe.predict(test)), classes))
    index = {c: i for i, c in enumerate(pipe.classes_)}
    known = [i for i, c in enumerate(ytest) if c in index]
    proba = pipe.predict_proba([test[i] for i in known])
    out["ece_15"] = round(expected_calibration_error(
        np.array([index[ytest[i]] for i in known]), proba), 4)
    secs = _best_of(lambda: pipe.predict_proba(test))
    out["batch_per_s"] = round(len(test) / secs, 0)
    out.update(_latency(lambda u: pipe.predict_proba([u]), test, n=300))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--datasets",
                        default="open-directory-hosts,domain-categories,demo-scenario")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--balanced", action="store_true",
                        help="also measure our model with class_balance=0.5")
    parser.add_argument("--fasttext-autotune-s", type=int, default=0,
                        help="seconds of fastText autotune per data set (0: fixed settings)")
    args = parser.parse_args()
    params = {"seed": args.seed}  # the defaults, as a user gets them
    result = {"benchmark": "url-model", "machine": machine(),
              "our_params": {k: (list(v) if isinstance(v, tuple) else v)
                             for k, v in params.items()},
              "datasets": {}}
    for name in args.datasets.split(","):
        print(f"[{name}] loading", file=sys.stderr, flush=True)
        raw, labels, split = _data(name)
        train = [raw[i] for i in split.train]
        ytrain = [labels[i] for i in split.train]
        test = [raw[i] for i in split.test]
        ytest = [labels[i] for i in split.test]
        taxonomy = demo_taxonomy() if name == "demo-scenario" else None
        classes = sorted(set(labels)) if taxonomy is None else list(taxonomy.names)
        entry = {"split": split.describe(), "classes": len(classes)}
        print(f"[{name}] ours", file=sys.stderr, flush=True)
        entry["ours"] = run_ours(train, ytrain, test, ytest, taxonomy, params)
        if args.balanced:
            print(f"[{name}] ours, class_balance=0.5", file=sys.stderr, flush=True)
            entry["ours_class_balance_0.5"] = run_ours(
                train, ytrain, test, ytest, taxonomy, {**params, "class_balance": 0.5})
        print(f"[{name}] fastText", file=sys.stderr, flush=True)
        entry["fasttext"] = run_fasttext(train, ytrain, test, ytest, classes, args.seed,
                                         args.fasttext_autotune_s)
        print(f"[{name}] scikit-learn", file=sys.stderr, flush=True)
        entry["sklearn_char_3_6"] = run_sklearn(train, ytrain, test, ytest, classes,
                                                args.seed, "char", (3, 6))
        entry["sklearn_char_wb_1_5"] = run_sklearn(train, ytrain, test, ytest, classes,
                                                   args.seed, "char_wb", (1, 5))
        ours = entry["ours"]
        peers = {p: entry[p] for p in ("fasttext", "sklearn_char_3_6", "sklearn_char_wb_1_5")
                 if "skipped" not in entry[p]}
        best_f1 = max(peers, key=lambda p: peers[p]["macro_f1"])
        fastest = min(peers, key=lambda p: peers[p]["fit_seconds"])
        entry["ratios_ours_over_best_peer"] = {
            "macro_f1": round(ours["macro_f1"] / peers[best_f1]["macro_f1"], 3),
            "macro_f1_peer": best_f1,
            "fit_seconds": round(ours["fit_seconds"] / max(peers[fastest]["fit_seconds"], 0.1),
                                 3),
            "fit_seconds_peer": fastest,
        }
        sk = entry["sklearn_char_3_6"]
        ft = entry["fasttext"]
        entry["targets"] = {
            "macro_f1_at_least_best_peer": ours["macro_f1"] >= peers[best_f1]["macro_f1"],
            "fit_at_most_sklearn_char_3_6": ours["fit_seconds"] <= sk["fit_seconds"],
            "batch_at_least_fasttext": None if "skipped" in ft
            else ours["batch_per_s"] >= ft["batch_per_s"],
            "single_p50_at_most_50us": ours["p50_us"] <= 50.0,
            "ece_at_most_0.04": ours["ece_15"] <= 0.04,
            "model_file_at_most_64MB": ours["model_file_bytes"] <= 64 * 2**20,
        }
        if name == "open-directory-hosts":
            entry["targets"]["macro_f1_at_least_0.40"] = ours["macro_f1"] >= 0.40
        result["datasets"][name] = entry
        print(f"[{name}] {entry}", file=sys.stderr, flush=True)
    write_json(result, args.json)


if __name__ == "__main__":
    main()
