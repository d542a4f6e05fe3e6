"""URL-only vs page-only vs fused, on real URL + page data and on the demo scenario; the
page model alone on 20 Newsgroups against a scikit-learn TF-IDF + logistic regression peer.

    python benchmarks/page_model.py --json out/page_model.json [--datasets webkb,news,demo]

WebKB (``../shared/data/university-pages``): leave-one-university-out (cornell, washington,
wisconsin each held out in turn; misc always trains), the usual protocol for this corpus.
Newsgroups: the by-date train/test split, header block stripped. Demo: the scenario's time
split, pages as the loopback site farm serves them (rendered directly, no sockets needed to
measure models). Prints one JSON object.
"""

from __future__ import annotations

import argparse
import gzip
import json
import resource
import sys
import time
from pathlib import Path

import numpy as np
from sklearn.metrics import accuracy_score, f1_score

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import SHARED_DATA, load_webkb_rows, machine, write_json  # noqa: E402

from cascade.bundle import fit_bundle  # noqa: E402
from cascade.extract import extract  # noqa: E402
from cascade.metrics import expected_calibration_error  # noqa: E402
from cascade.models.page_model import PageModel  # noqa: E402
from cascade.models.text_features import page_word_count  # noqa: E402
from cascade.urls import normalize  # noqa: E402


def _scores(name: str, proba: np.ndarray, y: np.ndarray) -> dict:
    pred = proba.argmax(axis=1)
    # reference implementations: sklearn.metrics accuracy_score and f1_score(average="macro")
    return {"accuracy": round(float(accuracy_score(y, pred)), 4),
            "macro_f1": round(float(f1_score(y, pred, average="macro")), 4),
            "ece_15": round(float(expected_calibration_error(y, proba)), 4)}


def _three_way(train_urls, train_labels, train_pages, test_urls, test_labels, test_pages,
               folds: int, seed: int, arrays: Path | None = None) -> dict:
    started = time.perf_counter()
    bundle = fit_bundle(train_urls, train_labels, train_pages, folds=folds, seed=seed)
    fit_s = time.perf_counter() - started
    classes = bundle.classes
    y = np.array([classes.index(label) for label in test_labels])
    pu = bundle.url_model.predict_proba(test_urls)
    t0 = time.perf_counter()
    per_page = []
    for p in test_pages[:300]:
        s = time.perf_counter()
        bundle.page_model.predict_proba([p])
        per_page.append((time.perf_counter() - s) * 1000)
    pp = bundle.page_model.predict_proba(test_pages)
    words = np.array([page_word_count(p) for p in test_pages])
    pf = bundle.fusion.predict_proba(pu, pp, words)
    right_url, right_fused = pu.argmax(1) == y, pf.argmax(1) == y
    if arrays is not None:
        _save_arrays(arrays, bundle, train_urls, test_urls, y, pu, pp, pf, words)
    return {"train_rows": len(train_urls), "test_rows": len(test_urls),
            "url_only": _scores("url", pu, y), "page_only": _scores("page", pp, y),
            "fused": _scores("fused", pf, y),
            "fused_fixed_share": round(float((right_fused & ~right_url).mean()), 4),
            "fused_broke_share": round(float((~right_fused & right_url).mean()), 4),
            "thin_pages_kept_url": int((words < bundle.fusion.min_page_words).sum()),
            "fit_seconds": round(fit_s, 1),
            "page_score_ms_p50": round(float(np.percentile(per_page, 50)), 2),
            "page_score_ms_p99": round(float(np.percentile(per_page, 99)), 2),
            "oof": bundle.report, "fusion_gates": bundle.fusion.describe(),
            "_arrays": (pu, pp, pf, y), "_t": time.perf_counter() - t0}


def _save_arrays(path: Path, bundle, train_urls, test_urls, y, pu, pp, pf, words) -> None:
    """Keep what the budget benchmark needs: both models' probabilities on the held-out
    rows and on the stacking (out-of-fold) rows, and each row's URL and registered domain."""
    path.parent.mkdir(parents=True, exist_ok=True)
    ho = bundle.held_out
    train_keys = [normalize(u) if isinstance(u, str) else u for u in train_urls]
    test_keys = [normalize(u) if isinstance(u, str) else u for u in test_urls]
    oof_keys = [train_keys[int(i)] for i in ho["rows"]]
    np.savez_compressed(
        path, classes=np.array(bundle.classes), y=y, url_proba=pu, page_proba=pp,
        fused_proba=pf, page_words=words,
        url=np.array([k.url for k in test_keys]),
        domain=np.array([k.registered_domain or k.host for k in test_keys]),
        oof_y=ho["y"], oof_url_proba=ho["url_proba"], oof_page_proba=ho["page_proba"],
        oof_page_words=ho["page_words"],
        oof_fused_proba=bundle.fusion.predict_proba(ho["url_proba"], ho["page_proba"],
                                                    ho["page_words"]),
        oof_url=np.array([k.url for k in oof_keys]),
        oof_domain=np.array([k.registered_domain or k.host for k in oof_keys]))


def webkb(folds: int, seed: int, arrays: Path | None = None) -> dict:
    loaded = load_webkb_rows()
    if loaded is None:
        return {"skipped": f"{SHARED_DATA / 'university-pages' / 'pages.jsonl.gz'} not found"}
    rows, skipped = loaded
    t0 = time.perf_counter()
    pages = [extract(r["html"], url=r["url"]) for r in rows]
    extract_s = time.perf_counter() - t0
    out: dict = {"rows": len(rows), "rows_with_unusable_url": skipped,
                 "extract_pages_per_s": round(len(rows) / extract_s, 1), "held_out": {}}
    pooled = {"url": [], "page": [], "fused": [], "y": []}
    for held in ("cornell", "washington", "wisconsin"):
        tr = [i for i, r in enumerate(rows) if r["university"] != held]
        te = [i for i, r in enumerate(rows) if r["university"] == held]
        res = _three_way([rows[i]["url"] for i in tr], [rows[i]["label"] for i in tr],
                         [pages[i] for i in tr], [rows[i]["url"] for i in te],
                         [rows[i]["label"] for i in te], [pages[i] for i in te], folds, seed,
                         arrays / f"webkb-{held}.npz" if arrays else None)
        pu, pp, pf, y = res.pop("_arrays")
        res.pop("_t")
        for key, arr in (("url", pu), ("page", pp), ("fused", pf), ("y", y)):
            pooled[key].append(arr)
        out["held_out"][held] = res
        print(f"webkb {held}: " + json.dumps({k: res[k] for k in
                                             ("url_only", "page_only", "fused")}),
              file=sys.stderr, flush=True)
    y = np.concatenate(pooled["y"])
    out["pooled"] = {name: _scores(name, np.vstack(pooled[name]), y)
                     for name in ("url", "page", "fused")}
    return out


def newsgroups(seed: int) -> dict:
    base = SHARED_DATA / "newsgroups"
    if not base.exists():
        return {"skipped": f"{base} not found"}

    def load(split: str) -> list[dict]:
        with gzip.open(base / f"20news_bydate_{split}.jsonl.gz", "rt", encoding="utf-8") as fh:
            return [json.loads(line) for line in fh]

    def body(text: str) -> str:
        return text.partition("\n\n")[2]  # the header block ends at the first blank line

    train, test = load("train"), load("test")
    tr_text = [body(r["text"]) for r in train]
    te_text = [body(r["text"]) for r in test]
    tr_y = [r["newsgroup"] for r in train]
    te_y = [r["newsgroup"] for r in test]
    t0 = time.perf_counter()
    model = PageModel(seed=seed, calibration_folds=0).fit(
        [extract(t, content_type="text/plain") for t in tr_text], tr_y)
    ours_fit = time.perf_counter() - t0
    t0 = time.perf_counter()
    pred = model.predict([extract(t, content_type="text/plain") for t in te_text])
    ours_rate = len(te_text) / (time.perf_counter() - t0)
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.linear_model import LogisticRegression

    t0 = time.perf_counter()
    vec = TfidfVectorizer(sublinear_tf=True, ngram_range=(1, 2), min_df=2)
    clf = LogisticRegression(C=20.0, max_iter=200).fit(vec.fit_transform(tr_text), tr_y)
    peer_fit = time.perf_counter() - t0
    t0 = time.perf_counter()
    peer_pred = clf.predict(vec.transform(te_text))
    peer_rate = len(te_text) / (time.perf_counter() - t0)
    ours = {"accuracy": round(accuracy_score(te_y, pred), 4),
            "macro_f1": round(f1_score(te_y, pred, average="macro"), 4),
            "fit_s": round(ours_fit, 1), "pages_per_s": round(ours_rate, 1)}
    peer = {"accuracy": round(accuracy_score(te_y, peer_pred), 4),
            "macro_f1": round(f1_score(te_y, peer_pred, average="macro"), 4),
            "fit_s": round(peer_fit, 1), "pages_per_s": round(peer_rate, 1)}
    return {"train": len(train), "test": len(test), "ours": ours,
            "sklearn_tfidf_logreg": peer,
            "ratios": {"accuracy": round(ours["accuracy"] / peer["accuracy"], 3),
                       "macro_f1": round(ours["macro_f1"] / peer["macro_f1"], 3),
                       "pages_per_s": round(ours["pages_per_s"] / peer["pages_per_s"], 3)}}


def demo(folds: int, seed: int, arrays: Path | None = None) -> dict:
    from cascade.evaluate import evaluation_split
    from cascade.scenario import generate_telemetry
    from cascade.scenario.pages import render_page

    records = generate_telemetry(seed=seed, n_sites=2000)
    keys = [normalize(r.url) for r in records]
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25, seed=seed)
    pages = [extract(render_page(r.url, r.label, r.page_seed), url=r.url) for r in records]
    res = _three_way([keys[i] for i in split.train], [records[i].label for i in split.train],
                     [pages[i] for i in split.train], [keys[i] for i in split.test],
                     [records[i].label for i in split.test], [pages[i] for i in split.test],
                     folds, seed, arrays / "demo.npz" if arrays else None)
    res.pop("_arrays")
    res.pop("_t")
    res["split"] = split.describe()
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--json", help="also write the JSON here")
    ap.add_argument("--datasets", default="webkb,news,demo")
    ap.add_argument("--folds", type=int, default=4)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--arrays", type=Path,
                    help="save per-split probabilities here (.npz) for benchmarks/budget.py")
    args = ap.parse_args()
    wanted = set(args.datasets.split(","))
    out: dict = {"benchmark": "page_model", "machine": machine()}
    if "demo" in wanted:
        out["demo"] = demo(args.folds, args.seed, args.arrays)
    if "webkb" in wanted:
        out["webkb"] = webkb(args.folds, args.seed, args.arrays)
    if "news" in wanted:
        out["newsgroups"] = newsgroups(args.seed)
    out["peak_rss_mb"] = round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)
    write_json(out, args.json)


if __name__ == "__main__":
    main()
