"""The sandboxed fetcher against plain ``httpx.AsyncClient`` (no guard, no limits), in one
run: pages/s and peak RSS fetching site-farm pages on loopback at 100-way concurrency.

The farm runs in its own process; each client run is a fresh process, so its peak RSS is
its own. Ours runs with its real policy (address guard, pinning, robots.txt obeyed, caps,
deadline), with the per-host delay off (the farm is ours). The peer fetches the same pages
by IP literal with a Host header (it has no resolver override) and reads each body whole.
A second run of ours streams 10x the URLs to show memory does not grow with the count.

``--mode mixed`` is the fetcher under attack: in one process and one event loop, 200
fetches at once, 100 good pages on 100 distinct hosts of the site farm and 100 hostile ones
(1xx floods, tiny-chunk and chunk-extension floods, an endless header block, gzip bombs,
robots.txt bombs, trickling bodies and heads) from ``tests/raw_servers.py``. The servers
run in a process of their own, so the client's stall and memory figures are its own. It
reports how many good pages came back ``ok``, the hostile outcomes per kind, the worst gap
between wakeups of a task that sleeps 10 ms in a loop (the event loop's worst stall), peak
RSS (psutil, sampled on each wakeup, and the kernel's high-water mark) and RSS after the
run, the wall time, and per kind what the servers managed to send.

    python benchmarks/fetch.py --json fetch.json
    python benchmarks/fetch.py --mode mixed --json fetch-mixed.json
"""

from __future__ import annotations

import argparse
import asyncio
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import ROOT, machine, run_child, write_json  # noqa: E402

#: the hostile kinds of the mixed load: (name, host label, path); robots.txt bombs are
#: chosen by the host name (raw_servers.ROBOTS_CASES), the others by the path
HOSTILE_KINDS = (
    ("continue-flood", "hostile", "/_raw/continue-flood"),
    ("early-hints-flood", "hostile", "/_raw/early-hints-flood"),
    ("tiny-chunks", "hostile", "/_raw/tiny-chunks"),
    ("chunk-extensions", "hostile", "/_raw/chunk-extensions"),
    ("endless-header-fold", "hostile", "/_raw/endless-header-fold"),
    ("gzip-bomb", "hostile", "/_raw/gzip-bomb"),
    ("robots-gzip-bomb", "robots-gzip-bomb", "/late/page"),
    ("robots-endless", "robots-endless", "/late/page"),
    ("trickle", "hostile", "/_raw/trickle?gap=0.5"),
    ("slow-head", "hostile", "/_raw/slow-head?gap=0.5"),
)


def _urls(count: int) -> list[tuple[str, str]]:
    """(host, path) pairs: the scenario's URLs, then the same sites with numbered paths."""
    from cascade.scenario import generate_telemetry
    from cascade.urls import normalize

    base = []
    for rec in generate_telemetry(seed=0):
        key = normalize(rec.url)
        base.append((key.host, key.path + (f"?{key.query}" if key.query else "")))
    out = []
    i = 0
    while len(out) < count:
        host, path = base[i % len(base)]
        if i >= len(base):
            path = f"{path}{'&' if '?' in path else '?'}n={i}"
        out.append((host, path))
        i += 1
    return out


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def role_farm() -> None:
    from cascade.scenario import generate_telemetry
    from cascade.scenario.site_farm import SiteFarm

    farm = SiteFarm(generate_telemetry(seed=0))
    farm.start()
    print(farm.port, flush=True)
    sys.stdin.read()  # serve until the parent closes our stdin
    farm.stop()


def role_ours(port: int, count: int, concurrency: int) -> dict:
    from cascade.fetch import Fetcher, FetchPolicy
    from cascade.fetch.resolver import StaticResolver

    class FarmResolver(StaticResolver):
        async def resolve(self, host: str, port_: int) -> list[str]:
            return ["127.0.0.1"]

    policy = FetchPolicy(ports=(port,), allow_networks=("127.0.0.1/32",),
                         per_host_delay_s=0.0, per_host_concurrency=concurrency,
                         concurrency=concurrency, deadline_s=30.0)
    pairs = _urls(count)

    async def run() -> dict:
        ok = 0
        outcomes: dict[str, int] = {}
        text_bytes = 0
        async with Fetcher(policy, FarmResolver({})) as fetcher:
            started = time.perf_counter()
            urls = (f"http://{h}:{port}{p}" for h, p in pairs)
            async for result in fetcher.fetch_many(urls, window=concurrency):
                outcomes[str(result.outcome)] = outcomes.get(str(result.outcome), 0) + 1
                ok += result.ok
                text_bytes += len(result.text or "")
            secs = time.perf_counter() - started
        return {"urls": count, "ok": ok, "outcomes": outcomes, "seconds": round(secs, 2),
                "pages_per_s": round(count / secs, 1), "text_mb": round(text_bytes / 1e6, 1)}

    out = asyncio.run(run())
    out["peak_rss_mb"] = round(_peak_rss_mb(), 1)
    return out


def role_peer(port: int, count: int, concurrency: int) -> dict:
    import httpx

    pairs = _urls(count)

    async def run() -> dict:
        ok = 0
        limits = httpx.Limits(max_connections=concurrency,
                              max_keepalive_connections=concurrency)
        async with httpx.AsyncClient(limits=limits, timeout=30.0) as client:
            sem = asyncio.Semaphore(concurrency)

            async def one(host: str, path: str) -> bool:
                async with sem:
                    r = await client.get(f"http://127.0.0.1:{port}{path}",
                                         headers={"Host": host})
                    _ = r.text
                    return r.status_code == 200

            started = time.perf_counter()
            window: set[asyncio.Task] = set()
            for h, p in pairs:
                window.add(asyncio.create_task(one(h, p)))
                if len(window) >= concurrency:
                    done, window = await asyncio.wait(window, return_when=asyncio.FIRST_COMPLETED)
                    ok += sum(t.result() for t in done)
            if window:
                done, _ = await asyncio.wait(window)
                ok += sum(t.result() for t in done)
            secs = time.perf_counter() - started
        return {"urls": count, "ok": ok, "seconds": round(secs, 2),
                "pages_per_s": round(count / secs, 1)}

    out = asyncio.run(run())
    out["peak_rss_mb"] = round(_peak_rss_mb(), 1)
    return out


def _raw_servers():
    """``tests/raw_servers.py``: test fixtures, not part of the package."""
    sys.path.insert(0, str(ROOT / "tests"))
    import raw_servers

    return raw_servers


def _mixed_jobs(farm_port: int, raw_port: int, good: int, hostile: int
                ) -> list[tuple[str, str]]:
    """(kind, URL): ``good`` farm pages on distinct hosts, then ``hostile`` cases drawn in
    turn from HOSTILE_KINDS, each on a host of its own (no politeness queue between them)."""
    from cascade.scenario import generate_telemetry
    from cascade.urls import normalize

    jobs: list[tuple[str, str]] = []
    hosts: set[str] = set()
    for rec in generate_telemetry(seed=0):
        key = normalize(rec.url)
        if key.host in hosts:
            continue
        hosts.add(key.host)
        path = key.path + (f"?{key.query}" if key.query else "")
        jobs.append(("good", f"http://{key.host}:{farm_port}{path}"))
        if len(jobs) == good:
            break
    for i in range(hostile):
        kind, label, path = HOSTILE_KINDS[i % len(HOSTILE_KINDS)]
        jobs.append((kind, f"http://{label}-{i}.test:{raw_port}{path}"))
    return jobs


def role_mixed_servers() -> None:
    """The site farm and a raw hostile server; ports on the first line, and when stdin
    closes, what the raw server sent per kind on the last."""
    from cascade.scenario import generate_telemetry
    from cascade.scenario.site_farm import SiteFarm

    raw_servers = _raw_servers()
    farm = SiteFarm(generate_telemetry(seed=0))
    farm.start()
    raw = raw_servers.RawServer()
    raw.start()
    print(json.dumps({"farm": farm.port, "raw": raw.port}), flush=True)
    sys.stdin.read()  # serve until the parent closes our stdin
    raw.settle(30)
    sent: dict[str, dict] = {}
    for exchange in raw.exchanges:
        request = exchange.request
        if request is None:
            continue
        label = request.host.split(".", 1)[0].rstrip("0123456789").rstrip("-")
        if request.path == "/robots.txt":
            kind = label if label.startswith("robots-") else "robots-none"
        elif request.path.startswith(raw_servers.CASE_PREFIX):
            kind = request.path[len(raw_servers.CASE_PREFIX):]
        else:
            kind = f"{label} page"
        entry = sent.setdefault(kind, {"requests": 0, "max_bytes_sent": 0,
                                       "total_bytes_sent": 0, "ended_by": {}})
        entry["requests"] += 1
        entry["max_bytes_sent"] = max(entry["max_bytes_sent"], exchange.bytes_sent)
        entry["total_bytes_sent"] += exchange.bytes_sent
        entry["ended_by"][exchange.ended_by] = entry["ended_by"].get(exchange.ended_by, 0) + 1
    raw.stop()
    farm.stop()
    print(json.dumps(sent), flush=True)


def _mixed_policy(farm_port: int, raw_port: int, concurrency: int, deadline_s: float):
    from cascade.fetch import FetchPolicy

    return FetchPolicy(ports=(farm_port, raw_port), allow_networks=("127.0.0.1/32",),
                       concurrency=concurrency, deadline_s=deadline_s)


def _run_load(jobs: list[tuple[str, str]], policy, sample=None) -> dict:
    """Fetch every job at once with one Fetcher in a fresh event loop, a 10 ms ticker
    beside them; the results, the worst gap between ticks and the wall time."""
    from cascade.fetch import Fetcher, StaticResolver

    raw_servers = _raw_servers()
    hosts = {url.split("://", 1)[1].split(":", 1)[0] for _, url in jobs}
    resolver = StaticResolver({h: ["127.0.0.1"] for h in hosts})

    async def run() -> dict:
        async with raw_servers.LoopTicker(0.01, sample) as ticker:
            started = time.perf_counter()
            async with Fetcher(policy, resolver) as fetcher:
                results = await asyncio.gather(*(fetcher.fetch(url) for _, url in jobs))
            wall = time.perf_counter() - started
        return {"results": results, "worst_gap_s": ticker.worst_gap_s, "ticks": ticker.ticks,
                "seconds": wall}

    return asyncio.run(run())


def _outcomes(jobs: list[tuple[str, str]], results) -> dict[str, dict[str, int]]:
    out: dict[str, dict[str, int]] = {}
    for (kind, _), result in zip(jobs, results, strict=True):
        by_kind = out.setdefault(kind, {})
        by_kind[str(result.outcome)] = by_kind.get(str(result.outcome), 0) + 1
    return out


def role_mixed(farm_port: int, raw_port: int, good: int, hostile: int,
               deadline_s: float) -> dict:
    """The good pages alone (the baseline), then the whole mixed load at once, in this
    process's one event loop: what the fetcher's own figures are under attack."""
    import gc

    import psutil

    jobs = _mixed_jobs(farm_port, raw_port, good, hostile)
    policy = _mixed_policy(farm_port, raw_port, len(jobs), deadline_s)
    good_jobs = [j for j in jobs if j[0] == "good"]
    baseline = _run_load(good_jobs, _mixed_policy(farm_port, raw_port, len(good_jobs),
                                                  deadline_s))
    baseline_ok = sum(r.ok for r in baseline.pop("results"))
    gc.collect()
    # the job list and the scenario behind it are this process's, not the fetcher's: park
    # them outside the collector, as a long-running service does with its start-up heap,
    # so a full collection's pause over them is not counted as the fetcher's stall
    gc.freeze()

    process = psutil.Process()
    rss_before = process.memory_info().rss
    peak = {"rss": rss_before}

    def sample() -> None:
        peak["rss"] = max(peak["rss"], process.memory_info().rss)

    run = _run_load(jobs, policy, sample)
    results = run.pop("results")
    outcomes = _outcomes(jobs, results)
    good_results = [r for (kind, _), r in zip(jobs, results, strict=True) if kind == "good"]
    not_ok = [{"url": r.url, "outcome": str(r.outcome), "detail": r.detail}
              for r in good_results if not r.ok]
    out = {
        "good": len(good_results), "good_ok": sum(r.ok for r in good_results),
        "good_not_ok": not_ok[:10],
        "slowest_good_ms": round(max((r.elapsed_ms + r.queued_ms for r in good_results),
                                     default=0.0), 1),
        "hostile_outcomes": {k: v for k, v in outcomes.items() if k != "good"},
        "hostile_max_bytes_read": max((r.bytes_read for (kind, _), r
                                       in zip(jobs, results, strict=True) if kind != "good"),
                                      default=0),
        "worst_stall_ms": round(run["worst_gap_s"] * 1000, 1), "ticks": run["ticks"],
        "seconds": round(run["seconds"], 2),
        "baseline_good_only": {"ok": baseline_ok,
                               "worst_stall_ms": round(baseline["worst_gap_s"] * 1000, 1),
                               "seconds": round(baseline["seconds"], 2)},
    }
    del results, good_results, run
    gc.collect()
    out["rss_before_mb"] = round(rss_before / 1e6, 1)
    out["peak_rss_mb"] = round(peak["rss"] / 1e6, 1)  # sampled on every ticker wakeup
    out["ru_maxrss_mb"] = round(_peak_rss_mb() * 1024 * 1024 / 1e6, 1)  # kernel high-water
    out["rss_after_mb"] = round(process.memory_info().rss / 1e6, 1)  # fetcher closed
    return out


def role_mixed_by_kind(farm_port: int, raw_port: int, good: int, hostile: int,
                       deadline_s: float) -> dict:
    """The good pages with one hostile kind at a time: which kind stalls the loop."""
    jobs = _mixed_jobs(farm_port, raw_port, good, hostile)
    out = {}
    for kind, _, _ in HOSTILE_KINDS:
        some = [j for j in jobs if j[0] in ("good", kind)]
        run = _run_load(some, _mixed_policy(farm_port, raw_port, len(some), deadline_s))
        outcomes = _outcomes(some, run["results"])
        out[kind] = {"count": sum(1 for k, _ in some if k == kind),
                     "good_ok": outcomes.get("good", {}).get("ok", 0),
                     "outcomes": outcomes.get(kind, {}),
                     "worst_stall_ms": round(run["worst_gap_s"] * 1000, 1),
                     "seconds": round(run["seconds"], 2)}
    return out


SERVERS_NICE = 19


def _with_mixed_servers(*client_args: str) -> tuple[dict, dict | None]:
    """Run a client child against a fresh servers process; (its JSON, what the servers
    sent per kind)."""
    # the servers stand for remote machines: on this box they share its cores, so they run
    # at the lowest priority (nice 19) and the stall measured is the fetcher's own loop,
    # not the scheduler's (--servers-nice 0 shows the shared-core figure)
    servers = subprocess.Popen(["nice", "-n", str(SERVERS_NICE), sys.executable, __file__,
                                "--role", "mixed-servers"],
                               stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        ports = json.loads(servers.stdout.readline())  # type: ignore[union-attr]
        client = _child(*client_args, "--farm-port", str(ports["farm"]),
                        "--raw-port", str(ports["raw"]))
    finally:
        servers.stdin.close()  # type: ignore[union-attr]
        lines = servers.stdout.read().strip().splitlines()  # type: ignore[union-attr]
        servers.wait(60)
    return client, (json.loads(lines[-1]) if lines else None)


def main_mixed(args: argparse.Namespace) -> None:
    global SERVERS_NICE
    SERVERS_NICE = args.servers_nice
    load = ["--good", str(args.good), "--hostile", str(args.hostile),
            "--deadline", str(args.deadline)]
    ours, server_sent = _with_mixed_servers("--role", "mixed", *load)
    by_kind = None
    if args.by_kind:
        by_kind, _ = _with_mixed_servers("--role", "mixed-by-kind", *load)
    peak = max(ours["peak_rss_mb"], ours["ru_maxrss_mb"])
    result = {
        "benchmark": "fetch-mixed", "machine": machine(),
        "inputs": {"good": args.good, "hostile": args.hostile,
                   "hostile_kinds": [k for k, _, _ in HOSTILE_KINDS],
                   "deadline_s": args.deadline, "concurrency": args.good + args.hostile,
                   "policy": "FetchPolicy defaults otherwise",
                   "server": "site farm and raw hostile server, own process, loopback, "
                             f"at nice {SERVERS_NICE}"},
        "ours": ours,
        "server_sent": server_sent,
        "by_kind": by_kind,
        "targets": {"all_good_ok": ours["good_ok"] == ours["good"],
                    "worst_stall_under_100ms": ours["worst_stall_ms"] < 100,
                    "peak_rss_under_300mb": peak < 300},
    }
    write_json(result, args.json)


def _child(*args: str) -> dict:
    return run_child(__file__, *args, timeout=1800)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--count", type=int, default=5000)
    parser.add_argument("--stream-count", type=int, default=50_000)
    parser.add_argument("--concurrency", type=int, default=100)
    parser.add_argument("--mode", choices=["rate", "mixed"], default="rate",
                        help="rate: pages/s against plain httpx (default); mixed: good and "
                             "hostile fetches at once")
    parser.add_argument("--good", type=int, default=100, help="mixed: good pages")
    parser.add_argument("--hostile", type=int, default=100, help="mixed: hostile fetches")
    parser.add_argument("--deadline", type=float, default=5.0, help="mixed: deadline_s")
    parser.add_argument("--servers-nice", type=int, default=19,
                        help="mixed: the servers' nice value (default 19: they stand for "
                             "remote machines; 0 to let them compete for the cores)")
    parser.add_argument("--by-kind", action="store_true",
                        help="mixed: also run the good pages with each hostile kind alone")
    parser.add_argument("--role", choices=["farm", "ours", "peer", "mixed-servers", "mixed",
                                           "mixed-by-kind"], help=argparse.SUPPRESS)
    parser.add_argument("--port", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--farm-port", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--raw-port", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.role == "mixed-servers":
        role_mixed_servers()
        return
    if args.role in ("mixed", "mixed-by-kind"):
        role = role_mixed if args.role == "mixed" else role_mixed_by_kind
        print(json.dumps(role(args.farm_port, args.raw_port, args.good, args.hostile,
                              args.deadline)))
        return
    if args.mode == "mixed":
        main_mixed(args)
        return
    if args.role == "farm":
        role_farm()
        return
    if args.role == "ours":
        print(json.dumps(role_ours(args.port, args.count, args.concurrency)))
        return
    if args.role == "peer":
        print(json.dumps(role_peer(args.port, args.count, args.concurrency)))
        return

    farm = subprocess.Popen([sys.executable, __file__, "--role", "farm"],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        port = int(farm.stdout.readline())  # type: ignore[union-attr]
        common = ["--port", str(port), "--concurrency", str(args.concurrency)]
        _child("--role", "peer", "--count", "500", *common)  # warm the farm's caches
        peer = _child("--role", "peer", "--count", str(args.count), *common)
        ours = _child("--role", "ours", "--count", str(args.count), *common)
        streamed = None
        if args.stream_count:
            streamed = _child("--role", "ours", "--count", str(args.stream_count), *common)
    finally:
        farm.stdin.close()  # type: ignore[union-attr]
        farm.wait(30)
    result = {
        "benchmark": "fetch", "machine": machine(),
        "inputs": {"count": args.count, "stream_count": args.stream_count,
                   "concurrency": args.concurrency, "server": "site farm, own process, loopback"},
        "ours": ours, "peer_httpx_plain": peer, "ours_streamed": streamed,
        "ratios": {"pages_per_s_ours_over_peer": round(ours["pages_per_s"] / peer["pages_per_s"],
                                                       3),
                   "peak_rss_ours_over_peer": round(ours["peak_rss_mb"] / peer["peak_rss_mb"], 3)},
        "targets": {"rate_at_least_0.8x_peer": ours["pages_per_s"] >= 0.8 * peer["pages_per_s"],
                    "peak_rss_under_300mb": ours["peak_rss_mb"] < 300,
                    "streamed_peak_rss_under_300mb": None if streamed is None
                    else streamed["peak_rss_mb"] < 300},
    }
    write_json(result, args.json)


if __name__ == "__main__":
    main()
