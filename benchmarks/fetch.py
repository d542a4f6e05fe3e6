"""The sandboxed fetcher against plain ``httpx.AsyncClient`` (no guard, no limits), in one
run: pages/s and peak RSS fetching site-farm pages on loopback at 100-way concurrency.

The farm runs in its own process; each client run is a fresh process, so its peak RSS is
its own. Ours runs with its real policy (address guard, pinning, robots.txt obeyed, caps,
deadline), with the per-host delay off (the farm is ours). The peer fetches the same pages
by IP literal with a Host header (it has no resolver override) and reads each body whole.
A second run of ours streams 10x the URLs to show memory does not grow with the count.

    python benchmarks/fetch.py --json fetch.json
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
from _common import machine, run_child, write_json  # noqa: E402


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


def _child(*args: str) -> dict:
    return run_child(__file__, *args, timeout=1800)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", help="write the result here too")
    parser.add_argument("--count", type=int, default=5000)
    parser.add_argument("--stream-count", type=int, default=50_000)
    parser.add_argument("--concurrency", type=int, default=100)
    parser.add_argument("--role", choices=["farm", "ours", "peer"], help=argparse.SUPPRESS)
    parser.add_argument("--port", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
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
