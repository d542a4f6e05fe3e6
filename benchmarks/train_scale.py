"""URL model training at scale: seconds and peak memory for 250,000 and 1,000,000 labelled
URLs on this machine, each size in a fresh process (its own peak RSS).

The URLs come from the invented demo scenario's generator (``generate_telemetry`` with
enough sites), so they are labelled without any download. How realistic: the generator
draws host names, paths and queries from invented word lists per category, so a million of
its URLs repeat n-grams more than a million real URLs would; real logs have more distinct
columns (up to the 2**20 hashing space) and so somewhat more memory for the weights, not
for the data, which grows with the number of n-gram occurrences either way. The peer
(scikit-learn HashingVectorizer char 3-6 + SGDClassifier, 30 epochs) is trained on the
same rows at the smaller size, in its own process too. The rows are generated in one
process and written to a TSV file; each measured process reads that file, as
``cascade train`` would, so its peak RSS is the training's and not the generator's.

    python benchmarks/train_scale.py --json docs/measurements/train_scale.json
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import machine, run_child, write_json  # noqa: E402


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _rows(n: int):
    from cascade.scenario import generate_telemetry

    records = generate_telemetry(seed=0, n_sites=max(10, int(n / 6.0)))
    while len(records) < n:  # the generator's URLs per site vary: top up with more sites
        records += generate_telemetry(seed=len(records), n_sites=max(10, (n - len(records))
                                                                     // 5))
    return records[:n]


def make(n: int, path: str) -> dict:
    """Write ``n`` labelled demo URLs to a TSV file (in its own process: the generator's
    own memory is not the training's)."""
    started = time.perf_counter()
    records = _rows(n)
    with open(path, "w", encoding="utf-8") as f:
        for r in records:
            f.write(f"{r.url}\t{r.label}\n")
    return {"rows": len(records), "generate_seconds": round(time.perf_counter() - started, 1)}


def child(n: int, system: str, path: str) -> dict:
    # the rows are read from a file, as `cascade train` reads them: the process holds the
    # URL strings and labels, not the generator's records
    urls, labels = [], []
    with open(path, encoding="utf-8") as f:
        for line in f:
            url, _, label = line.rstrip("\n").partition("\t")
            urls.append(url)
            labels.append(label)
    base_rss = _rss_mb()
    out = {"rows": n, "system": system, "rss_after_reading_mb": round(base_rss, 1)}
    if system == "ours":
        from cascade.models.url_model import UrlModel

        # the URL strings go to fit as a user's would: fit normalizes them (its time is in
        # fit_seconds) and lets the normalized keys go once featurized
        t = time.perf_counter()
        model = UrlModel().fit(urls, labels,
                               progress=lambda m: print(m, file=sys.stderr, flush=True))
        del urls
        out["fit_seconds"] = round(time.perf_counter() - t, 1)
        out["optimizer"] = {k: model.optimizer_[k] for k in
                            ("iterations", "converged", "used_columns", "gradient_max")}
        out["calibration_fits"] = model.optimizer_["calibration_fits"]
        out["temperature"] = round(model.temperature_, 4)
    else:
        from sklearn.feature_extraction.text import HashingVectorizer
        from sklearn.linear_model import SGDClassifier
        from sklearn.pipeline import make_pipeline

        pipe = make_pipeline(
            HashingVectorizer(analyzer="char", ngram_range=(3, 6), n_features=2**20),
            SGDClassifier(loss="log_loss", alpha=1e-5, max_iter=30, tol=None, random_state=0))
        t = time.perf_counter()
        pipe.fit(urls, labels)
        out["fit_seconds"] = round(time.perf_counter() - t, 1)
    out["peak_rss_mb"] = round(_rss_mb(), 1)
    out["rows_per_second"] = round(n / max(out["fit_seconds"], 1e-9), 0)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--sizes", default="250000,1000000")
    parser.add_argument("--peer-size", type=int, default=250000,
                        help="rows for the scikit-learn peer (0: skip)")
    parser.add_argument("--child", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--system", default="ours", help=argparse.SUPPRESS)
    parser.add_argument("--rows-file", help=argparse.SUPPRESS)
    parser.add_argument("--make", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.make:
        print(json.dumps(make(args.make, args.rows_file)))
        return
    if args.child:
        print(json.dumps(child(args.child, args.system, args.rows_file)))
        return
    sizes = [int(s) for s in args.sizes.split(",")]
    out = {"benchmark": "url-model-train-scale", "machine": machine(), "runs": []}
    tmp = tempfile.mkdtemp(prefix="cascade-train-scale-")
    files = {}
    for n in sorted(set(sizes) | ({args.peer_size} if args.peer_size else set())):
        files[n] = str(Path(tmp) / f"rows-{n}.tsv")
        made = run_child(__file__, "--make", str(n), "--rows-file", files[n], timeout=3600)
        out.setdefault("generate_seconds", {})[str(n)] = made["generate_seconds"]
    for n in sizes:
        print(f"[{n}] ours", file=sys.stderr, flush=True)
        out["runs"].append(run_child(__file__, "--child", str(n), "--rows-file", files[n],
                                     timeout=3600))
        print(json.dumps(out["runs"][-1]), file=sys.stderr, flush=True)
    if args.peer_size:
        print(f"[{args.peer_size}] scikit-learn peer", file=sys.stderr, flush=True)
        peer = run_child(__file__, "--child", str(args.peer_size), "--system", "sklearn",
                         "--rows-file", files[args.peer_size], timeout=3600)
        out["runs"].append(peer)
        ours = next((r for r in out["runs"] if r["system"] == "ours"
                     and r["rows"] == args.peer_size), None)
        if ours:
            out["ours_over_peer_rows_per_second"] = round(
                ours["rows_per_second"] / peer["rows_per_second"], 3)
    mine = [r for r in out["runs"] if r["system"] == "ours"]
    if len(mine) >= 2:
        a, b = mine[0], mine[-1]
        out["rss_slope_mb_per_100k_rows"] = round(
            (b["peak_rss_mb"] - a["peak_rss_mb"]) / ((b["rows"] - a["rows"]) / 1e5), 1)
        out["targets"] = {"1M_fit_under_300_s": b["fit_seconds"] < 300,
                          "1M_peak_rss_under_4GB": b["peak_rss_mb"] < 4096}
    shutil.rmtree(tmp, ignore_errors=True)
    write_json(out, args.json)


if __name__ == "__main__":
    main()
