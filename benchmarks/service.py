"""The embedded decision API: how long one decision takes, in process and over HTTP.

In one run, on a URL model trained on the invented scenario (``UrlModel()`` defaults) and a
verdict store holding page verdicts for half of the held-out URLs:

- **floor**: the URL model called directly (``UrlModel.predict_proba_one`` on the URL
  string, normalization included), one call at a time.
- **peer**: fastText's single-call ``predict`` (minn 3, maxn 6, trained on the same rows in
  this run), one call at a time.
- **ours**: ``Triage.classify`` for model-only decisions (URLs the store does not know,
  each asked once: no cache help), for store hits (cache off, so every call reads the
  store), and for repeated URLs (cache hits); p50/p99 and single-thread throughput; then
  the model-only throughput on 2 threads.
- **HTTP**: ``cascade serve`` as a real subprocess on 127.0.0.1; the load comes from a
  second process: httpx 0.x sync clients, ``--http-threads`` threads with keep-alive, a
  fixed number of requests (single GETs, then 100-URL batch POSTs). Requests/s and p50/p99.

    python benchmarks/service.py --json out/service.json
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import ROOT, machine, write_json  # noqa: E402


def _quantiles_us(samples: list[float]) -> dict:
    s = sorted(samples)
    q = statistics.quantiles(s, n=100, method="inclusive")
    return {"p50_us": round(q[49] * 1e6, 2), "p99_us": round(q[98] * 1e6, 2),
            "mean_us": round(statistics.fmean(s) * 1e6, 2), "calls": len(s)}


def _time_each(fn, items) -> list[float]:
    out = []
    clock = time.perf_counter
    for item in items:
        t = clock()
        fn(item)
        out.append(clock() - t)
    return out


def _throughput(fn, items, threads: int) -> dict:
    """Decisions per second with ``threads`` threads sharing ``items``."""
    parts = [items[k::threads] for k in range(threads)]
    barrier = threading.Barrier(threads + 1)

    def work(part: list[str]) -> None:
        barrier.wait()
        for item in part:
            fn(item)

    pool = [threading.Thread(target=work, args=(p,)) for p in parts]
    for t in pool:
        t.start()
    barrier.wait()
    started = time.perf_counter()
    for t in pool:
        t.join()
    seconds = time.perf_counter() - started
    return {"threads": threads, "decisions": len(items), "seconds": round(seconds, 3),
            "per_second": round(len(items) / seconds, 1)}


def _fasttext_peer(train_urls, train_labels, test_urls, tmp: Path) -> dict:
    try:
        import fasttext
    except ImportError:
        return {"skipped": "fasttext not installed (pip install -e '.[bench]')"}
    from url_model import _ft_text  # the same tokenization as benchmarks/url_model.py

    path = tmp / "ft.txt"
    with path.open("w", encoding="utf-8") as fh:
        for u, y in zip(train_urls, train_labels, strict=True):
            fh.write(f"__label__{y} {_ft_text(u)}\n")
    model = fasttext.train_supervised(input=str(path), verbose=0, minn=3, maxn=6, dim=100,
                                      epoch=25, lr=0.5, thread=1, seed=0)
    samples = _time_each(lambda u: model.predict(_ft_text(u), k=3), test_urls)
    return {"single_call": _quantiles_us(samples),
            "note": "predict(text, k=3) on the URL split into words, as in url_model.py"}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def role_load(base: str, urls_file: str, requests: int, threads: int, batch: int) -> dict:
    """The load process: ``threads`` httpx clients with keep-alive, ``requests`` in all."""
    import httpx

    urls = Path(urls_file).read_text(encoding="utf-8").split("\n")
    latencies: list[list[float]] = [[] for _ in range(threads)]
    errors = [0] * threads

    def work(k: int) -> None:
        with httpx.Client(base_url=base, timeout=30) as client:
            for i in range(k, requests, threads):
                t = time.perf_counter()
                try:
                    if batch > 1:
                        start = (i * batch) % max(1, len(urls) - batch)
                        r = client.post("/v1/classify", json={"urls": urls[start:start + batch]})
                    else:
                        r = client.get("/v1/classify", params={"url": urls[i % len(urls)]})
                    ok = r.status_code == 200
                except httpx.HTTPError:
                    ok = False
                latencies[k].append(time.perf_counter() - t)
                errors[k] += not ok

    pool = [threading.Thread(target=work, args=(k,)) for k in range(threads)]
    started = time.perf_counter()
    for t in pool:
        t.start()
    for t in pool:
        t.join()
    seconds = time.perf_counter() - started
    flat = [x for part in latencies for x in part]
    q = _quantiles_us(flat)
    return {"requests": len(flat), "errors": sum(errors), "seconds": round(seconds, 3),
            "requests_per_s": round(len(flat) / seconds, 1),
            "urls_per_s": round(len(flat) * batch / seconds, 1),
            "p50_ms": round(q["p50_us"] / 1e3, 3), "p99_ms": round(q["p99_us"] / 1e3, 3),
            "load_tool": f"httpx {httpx.__version__} sync clients, {threads} threads, "
                         "keep-alive, separate process", "batch": batch}


def _http(model_dir: Path, store: Path, urls: list[str], tmp: Path, requests: int,
          threads: int) -> dict:
    port = _free_port()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    server = subprocess.Popen(
        [sys.executable, "-m", "cascade.cli", "--quiet", "serve", "--model", str(model_dir),
         "--store", str(store), "--port", str(port)],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    try:
        import httpx

        deadline = time.monotonic() + 60
        while True:
            try:
                if httpx.get(f"{base}/v1/health", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if time.monotonic() > deadline or server.poll() is not None:
                raise SystemExit(f"cascade serve did not start: {server.stderr.read()[-2000:]}")
            time.sleep(0.1)
        urls_file = tmp / "urls.txt"
        urls_file.write_text("\n".join(urls), encoding="utf-8")
        out = {}
        for name, batch, n in (("single", 1, requests), ("batch_100", 100, requests // 20)):
            proc = subprocess.run(
                [sys.executable, __file__, "--role", "load", "--base", base, "--urls-file",
                 str(urls_file), "--requests", str(n), "--threads", str(threads),
                 "--batch", str(batch)], capture_output=True, text=True, timeout=600,
                env=env, check=False)
            if proc.returncode != 0:
                raise SystemExit(f"load process failed: {proc.stderr[-2000:]}")
            out[name] = json.loads(proc.stdout.strip().splitlines()[-1])
        metrics = httpx.get(f"{base}/metrics", timeout=5).text
        out["metrics_lines"] = len(metrics.splitlines())
        return out
    finally:
        server.terminate()
        server.wait(30)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", help="also write the result here")
    parser.add_argument("--sites", type=int, default=1500, help="invented sites (default 1500)")
    parser.add_argument("--calls", type=int, default=20000,
                        help="in-process calls per measurement (default 20000)")
    parser.add_argument("--http-requests", type=int, default=4000)
    parser.add_argument("--http-threads", type=int, default=4)
    parser.add_argument("--role", default="main", choices=["main", "load"])
    parser.add_argument("--base")
    parser.add_argument("--urls-file")
    parser.add_argument("--requests", type=int, default=0)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--batch", type=int, default=1)
    args = parser.parse_args()
    if args.role == "load":
        print(json.dumps(role_load(args.base, args.urls_file, args.requests, args.threads,
                                   args.batch)))
        return

    from cascade.bundle import ModelBundle
    from cascade.evaluate import evaluation_split
    from cascade.models.url_model import UrlModel
    from cascade.scenario import generate_telemetry
    from cascade.service import Triage, TriagePolicy
    from cascade.store import VerdictStore
    from cascade.taxonomy import demo_taxonomy
    from cascade.urls import normalize
    from cascade.verdict import Reason, Stage, Verdict

    records = generate_telemetry(seed=0, n_sites=args.sites)
    keys = [normalize(r.url) for r in records]
    split = evaluation_split(keys, [r.seen_at for r in records], test_fraction=0.25, seed=0)
    train = [records[i] for i in split.train]
    test = [records[i] for i in split.test]
    started = time.perf_counter()
    model = UrlModel().fit([r.url for r in train], [r.label for r in train],
                           taxonomy=demo_taxonomy())
    fit_s = time.perf_counter() - started
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        model_dir = ModelBundle(model).save(tmp / "model")
        store_path = tmp / "verdicts.sqlite"
        test_urls = [r.url for r in test]
        known = test_urls[::2]  # the store holds page verdicts for half of them
        with VerdictStore.open(store_path) as store:
            store.write_verdicts([Verdict(
                url=normalize(u).url, category=r.label, confidence=0.95,
                top=((r.label, 0.95),), stage=Stage.PAGE, needs_fetch=False,
                reason=Reason.FUSED, model_version="bench") for u, r in zip(known, test[::2],
                                                                         strict=True)],
                domains={normalize(u).url: normalize(u).registered_domain for u in known})
        calls = args.calls
        # distinct URLs the store cannot answer (a fresh query string on each): every call
        # normalizes, reads the store, misses, and runs the model
        unknown = [f"http://{normalize(r.url).registered_domain.split('.')[0]}-x{i}.test"
                   f"{normalize(r.url).path}?q={i}"
                   for i, r in zip(range(calls), (test * (calls // len(test) + 1)),
                                   strict=False)]
        hits = (known * (calls // len(known) + 1))[:calls]

        # one pass first, so the floor and ours both meet warm caches (token hashes, host
        # words, public-suffix lookups): the first pass over new hosts costs more for both
        _time_each(model.predict_proba_one, unknown)
        floor = _quantiles_us(_time_each(model.predict_proba_one, unknown))
        peer = _fasttext_peer([r.url for r in train], [r.label for r in train], unknown[:calls],
                              tmp)
        policy = TriagePolicy(domain_fallback=False, queue=False)
        with Triage.open(model_dir, store_path, policy) as triage:
            model_only = _time_each(triage.classify, unknown)
            tp_model_1 = _throughput(triage.classify,
                                     [u + "&t=1" for u in unknown], 1)
            tp_model_2 = _throughput(triage.classify,
                                     [u + "&t=2" for u in unknown], 2)
            cached = _time_each(triage.classify, unknown[:2000] * 5)
        with Triage.open(model_dir, store_path,
                         TriagePolicy(cache_size=0, queue=False)) as triage:
            store_hits = _time_each(triage.classify, hits)
            tp_store_2 = _throughput(triage.classify, hits, 2)
            with_domain = _time_each(triage.classify, unknown[:5000])
        http = _http(model_dir, store_path, test_urls, tmp, args.http_requests,
                     args.http_threads)
    ours = {
        "model_only": _quantiles_us(model_only),
        "model_only_with_domain_lookup": _quantiles_us(with_domain),
        "store_hits_no_cache": _quantiles_us(store_hits),
        "cache_hits": _quantiles_us(cached),
        "throughput_model_only_1_thread": tp_model_1,
        "throughput_model_only_2_threads": tp_model_2,
        "throughput_store_hits_2_threads": tp_store_2,
    }
    result = {
        "benchmark": "service",
        "machine": machine(),
        "inputs": {"sites": args.sites, "train_urls": len(train), "test_urls": len(test),
                   "store_verdicts": len(known), "calls": calls,
                   "model": "UrlModel() defaults", "fit_s": round(fit_s, 1),
                   "classes": len(model.classes_)},
        "floor_url_model_direct": floor,
        "peer_fasttext": peer,
        "ours": ours,
        "http": http,
        "ratios": {
            "model_only_p50_over_floor_p50": round(ours["model_only"]["p50_us"]
                                                   / floor["p50_us"], 3),
            "model_only_p50_over_fasttext_p50": None if "skipped" in peer else round(
                ours["model_only"]["p50_us"] / peer["single_call"]["p50_us"], 3),
        },
        "targets": {
            "p99_model_only_at_most_1ms": ours["model_only"]["p99_us"] <= 1000,
            "p99_store_hits_at_most_1ms": ours["store_hits_no_cache"]["p99_us"] <= 1000,
            "model_only_1_thread_at_least_20000_per_s":
                tp_model_1["per_second"] >= 20000,
        },
    }
    write_json(result, args.json)


if __name__ == "__main__":
    main()
