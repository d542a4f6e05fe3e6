"""The embedded decision API (``cascade.service.Triage``) and its HTTP endpoint
(``cascade.service_http``): a real SQLite store, a real uvicorn server on 127.0.0.1 and a
real HTTP client (httpx); the night that writes while the endpoint serves is a real child
process against the loopback site farm."""

from __future__ import annotations

import contextlib
import json
import os
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from cascade.bundle import ModelBundle
from cascade.errors import InvalidURL, ModelFileError, StoreError, UsageError
from cascade.scenario.site_farm import SiteFarm
from cascade.service import Triage, TriagePolicy
from cascade.store import StorePolicy, VerdictStore
from cascade.urls import normalize
from cascade.verdict import Reason, Stage, Verdict

pytest.importorskip("starlette")
pytest.importorskip("uvicorn")

from cascade.service_http import ServeConfig, build_app, load_token  # noqa: E402

HERE = Path(__file__).parent
TOKEN = "t0ken-for-the-loopback-tests-only"


@pytest.fixture(scope="module")
def dirs(tmp_path_factory: pytest.TempPathFactory, bundle: ModelBundle, url_model) -> dict:
    """Two saved model directories (the shared bundle, and a URL-only one) and a store."""
    root = tmp_path_factory.mktemp("service")
    bundle.save(root / "bundle")
    ModelBundle(url_model).save(root / "url-only")
    return {"root": root, "bundle": root / "bundle", "url_only": root / "url-only"}


@pytest.fixture()
def store_path(tmp_path: Path) -> Path:
    path = tmp_path / "verdicts.sqlite"
    VerdictStore.open(path).close()
    return path


def _page_verdict(url: str, category: str, confidence: float = 0.93) -> Verdict:
    return Verdict(url=url, category=category, confidence=confidence,
                   top=((category, confidence),), stage=Stage.PAGE, needs_fetch=False,
                   reason=Reason.FUSED, model_version="page-test")


# --------------------------------------------------------------------------- deciding
def test_model_decisions_are_the_bundles_verdicts(dirs, scenario) -> None:
    # the request path (one URL, no matrix) must agree with the pipeline's batch verdicts
    urls = scenario.urls[600:700]
    bundle = ModelBundle.load(dirs["bundle"])
    expected = bundle.verdicts(urls, fetch_below=0.8)
    with Triage.open(dirs["bundle"], policy=TriagePolicy(cache_size=0)) as triage:
        singles = [triage.classify(u) for u in urls]
        many = triage.classify_many(urls)
    for got_one, got_many, want in zip(singles, many, expected, strict=True):
        for got in (got_one, got_many):
            assert isinstance(got, Verdict)
            assert (got.url, got.category, got.stage, got.reason, got.needs_fetch,
                    got.model_version) == (want.url, want.category, want.stage, want.reason,
                                           want.needs_fetch, want.model_version)
            # float32 weights summed in another order: equal to about 1e-7
            assert got.confidence == pytest.approx(want.confidence, abs=1e-6)
            assert [c for c, _ in got.top] == [c for c, _ in want.top]


def test_store_first_then_domain_then_model(dirs, store_path: Path) -> None:
    with VerdictStore.open(store_path) as store:
        store.write_verdicts([_page_verdict("http://daily-ledger.example/", "news")],
                             domains={"http://daily-ledger.example/": "daily-ledger.example"})
        store.label("http://lucky-wheel.example/spin", "gambling", domain="lucky-wheel.example")
    with Triage.open(dirs["bundle"], store_path) as triage:
        exact = triage.classify("HTTP://Daily-Ledger.example")
        assert (exact.stage, exact.reason, exact.category) == (Stage.PAGE, Reason.FUSED, "news")
        domain = triage.classify("https://www.daily-ledger.example/world/today")
        assert (domain.stage, domain.reason, domain.category) == (Stage.PAGE, Reason.DOMAIN,
                                                                  "news")
        assert domain.url == "https://www.daily-ledger.example/world/today"
        label = triage.classify("http://lucky-wheel.example/spin")
        assert (label.stage, label.reason, label.confidence) == (Stage.LABEL, Reason.ANALYST,
                                                                 1.0)
        unknown = triage.classify("http://quiet-meadow.test/about")
        assert unknown.stage == Stage.URL and unknown.model_version == triage.model_version
    with Triage.open(dirs["bundle"], store_path,
                     TriagePolicy(domain_fallback=False)) as triage:
        assert triage.classify("https://www.daily-ledger.example/world/today").stage == Stage.URL


def test_a_stale_page_verdict_is_served_and_queued_again(dirs, store_path: Path) -> None:
    old = Verdict(url="http://old-news.example/", category="news", confidence=0.9,
                  top=(("news", 0.9),), stage=Stage.PAGE, needs_fetch=False,
                  reason=Reason.FUSED, model_version="m", decided_at="2020-01-01T00:00:00Z")
    with VerdictStore.open(store_path) as store:
        store.write_verdicts([old])
    with Triage.open(dirs["bundle"], store_path) as triage:
        v = triage.classify("http://old-news.example/")
    assert (v.stage, v.reason, v.needs_fetch) == (Stage.PAGE, Reason.STALE, True)
    with VerdictStore.open(store_path, readonly=True) as store:
        assert ("http://old-news.example/", 1) in store.refine_queue()


def test_needs_fetch_urls_reach_the_refine_queue_with_their_lookup_counts(
        dirs, store_path: Path, scenario) -> None:
    policy = TriagePolicy(fetch_below=1.0)  # everything is worth a fetch here
    urls = scenario.urls[700:720]
    with Triage.open(dirs["bundle"], store_path, policy) as triage:
        for _ in range(3):
            for u in urls:
                assert triage.classify(u).needs_fetch
        triage.classify_many(urls)
    with VerdictStore.open(store_path, readonly=True) as store:
        queue = dict(store.refine_queue())
    assert queue == {normalize(u).url: 4 for u in dict.fromkeys(urls)}


def test_the_memory_queue_is_bounded_and_drops_are_counted(dirs, store_path, scenario) -> None:
    policy = TriagePolicy(fetch_below=1.0, queue_max=5, queue_flush_at=10**6,
                          queue_flush_s=3600)
    urls = list(dict.fromkeys(normalize(u).url for u in scenario.urls[:40]))
    with Triage.open(dirs["bundle"], store_path, policy) as triage:
        for u in urls:
            triage.classify(u)
        stats = triage.stats()
        assert stats.queue_pending == 5 and stats.queue_dropped == len(urls) - 5


def test_invalid_urls_raise_a_typed_error_or_stay_in_place(dirs) -> None:
    with Triage.open(dirs["bundle"]) as triage:
        with pytest.raises(InvalidURL):
            triage.classify("http://exa mple.test/")
        out = triage.classify_many(["http://fine.example/", "::nope::", "http://ok.test/"],
                                   errors="keep")
        assert isinstance(out[0], Verdict) and isinstance(out[2], Verdict)
        assert isinstance(out[1], InvalidURL)
        with pytest.raises(InvalidURL):
            triage.classify_many(["http://fine.example/", "::nope::"])
        assert triage.stats().invalid_urls == 3


def test_a_missing_store_is_an_error_unless_asked_to_create_it(dirs, tmp_path) -> None:
    with pytest.raises(StoreError, match="no such verdict store"):
        Triage.open(dirs["bundle"], tmp_path / "typo.sqlite")
    with Triage.open(dirs["bundle"], tmp_path / "new.sqlite", create_store=True):
        pass
    assert (tmp_path / "new.sqlite").is_file()


def test_the_cache_follows_the_store(dirs, store_path: Path) -> None:
    # a label written by another connection (the nightly job, an analyst) is seen once the
    # store check runs, even for a URL whose model decision was cached
    url = "http://cached-site.example/page"
    policy = TriagePolicy(store_check_s=0.05)
    with Triage.open(dirs["bundle"], store_path, policy) as triage:
        assert triage.classify(url).stage == Stage.URL
        assert triage.classify(url).stage == Stage.URL
        assert triage.stats().cache_hits == 1
        with VerdictStore.open(store_path) as store:
            store.label(url, "shopping")
        deadline = time.monotonic() + 5
        while triage.classify(url).stage != Stage.LABEL:
            assert time.monotonic() < deadline, "the label never showed"
            time.sleep(0.06)


def test_async_twins_give_the_same_answers(dirs, scenario) -> None:
    import asyncio

    urls = scenario.urls[:100]
    with Triage.open(dirs["bundle"]) as triage:
        want = [v.category for v in triage.classify_many(urls)]

        async def run() -> tuple[str, list]:
            one = await triage.aclassify(urls[0])
            many = await triage.aclassify_many(urls)
            return one.category, [v.category for v in many]

        one, many = asyncio.run(run())
    assert one == want[0] and many == want


# --------------------------------------------------------------------------- hot reload
def test_reload_under_concurrent_load_fails_no_request(dirs, scenario) -> None:
    urls = scenario.urls[:300]
    versions = {ModelBundle.load(dirs["bundle"]).version,
                ModelBundle.load(dirs["url_only"]).version}
    errors: list[BaseException] = []
    seen: set[str] = set()
    stop = threading.Event()
    done = [0]
    with Triage.open(dirs["bundle"], policy=TriagePolicy(cache_size=64)) as triage:
        def hammer(offset: int) -> None:
            i = offset
            while not stop.is_set():
                try:
                    if i % 7 == 0:
                        batch = triage.classify_many(urls[i % 250:i % 250 + 20])
                        assert len({v.model_version for v in batch}) == 1  # one model each
                        seen.update(v.model_version for v in batch)
                    else:
                        seen.add(triage.classify(urls[i % len(urls)]).model_version)
                    done[0] += 1
                except BaseException as exc:  # noqa: BLE001 - counted, the test fails
                    errors.append(exc)
                i += 1

        threads = [threading.Thread(target=hammer, args=(k,)) for k in range(2)]
        for t in threads:
            t.start()
        for n in range(8):
            time.sleep(0.05)
            triage.reload(dirs["url_only"] if n % 2 == 0 else dirs["bundle"])
        with pytest.raises(ModelFileError):  # a broken directory never replaces the model
            triage.reload(dirs["root"])
        assert triage.model_version == ModelBundle.load(dirs["bundle"]).version
        stop.set()
        for t in threads:
            t.join(30)
        stats = triage.stats()
    assert not errors, errors[:3]
    assert done[0] > 100 and seen == versions
    assert (stats.reloads, stats.reload_failures) == (8, 1)


# --------------------------------------------------------------------------- HTTP
@contextlib.contextmanager
def running(triage: Triage, config: ServeConfig) -> Iterator[str]:
    """A real uvicorn server on 127.0.0.1 in a thread; yields its base URL."""
    import uvicorn

    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(build_app(triage, config), http="h11",
                                           loop="asyncio", lifespan="off",
                                           log_level="warning", access_log=False))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        assert time.monotonic() < deadline and thread.is_alive(), "server did not start"
        time.sleep(0.01)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(20)
        sock.close()


def test_http_endpoint_answers_single_and_batch_requests(dirs, store_path, scenario) -> None:
    urls = scenario.urls[600:650]
    with Triage.open(dirs["bundle"], store_path) as triage, \
            running(triage, ServeConfig()) as base, httpx.Client(base_url=base,
                                                                timeout=10) as client:
        one = client.get("/v1/classify", params={"url": urls[0]})
        assert one.status_code == 200, one.text
        assert one.json()["input"] == urls[0] and one.json()["url"] == normalize(urls[0]).url
        posted = client.post("/v1/classify", json={"url": urls[0]}).json()
        assert posted["category"] == one.json()["category"]
        batch = client.post("/v1/classify", json={"urls": [*urls, "::bad::"]})
        assert batch.status_code == 200
        items = batch.json()["verdicts"]
        assert [v["category"] for v in items[:-1]] == \
            [v.category for v in triage.classify_many(urls)]
        assert items[-1]["error"] == "invalid-url" and items[-1]["input"] == "::bad::"
        health = client.get("/v1/health").json()
        assert health == {"status": "ok", "model_version": triage.model_version}
        version = client.get("/v1/version").json()
        assert version["model_version"] == triage.model_version
        assert version["classes"] == list(triage.classes)


def test_http_endpoint_gives_clear_4xx_errors(dirs) -> None:
    config = ServeConfig(max_body_bytes=4096, max_batch=10)
    with Triage.open(dirs["bundle"]) as triage, running(triage, config) as base, \
            httpx.Client(base_url=base, timeout=10) as client:
        def status(response: httpx.Response) -> tuple[int, str]:
            return response.status_code, response.json()["error"]

        assert status(client.post("/v1/classify", content=b"{nope",
                                  headers={"content-type": "application/json"})) == \
            (400, "bad-json")
        assert status(client.post("/v1/classify", json={"urls": ["http://a.test/"] * 11})) \
            == (413, "too-large")
        assert status(client.post("/v1/classify", json={"url": "x" * 5000})) == \
            (413, "too-large")

        def chunks() -> Iterator[bytes]:  # no Content-Length: the body is counted anyway
            for _ in range(10):
                yield b" " * 1000

        assert status(client.post("/v1/classify", content=chunks(),
                                  headers={"content-type": "application/json"})) == \
            (413, "too-large")
        assert status(client.post("/v1/classify", content=b'{"url": "http://a.test/"}',
                                  headers={"content-type": "text/plain"})) == \
            (415, "unsupported-media-type")
        assert status(client.post("/v1/classify", json={"urls": "http://a.test/"})) == \
            (422, "invalid")
        assert status(client.post("/v1/classify", json={})) == (422, "invalid")
        assert status(client.get("/v1/classify", params={"url": "http://exa mple/"})) == \
            (422, "invalid-url")
        assert status(client.get("/v1/classify")) == (422, "invalid")
        assert status(client.get("/v1/nothing")) == (404, "not-found")
        assert status(client.delete("/v1/classify")) == (405, "method-not-allowed")
        # label and reload always need a token; this server has none
        assert status(client.post("/v1/reload")) == (403, "forbidden")
        assert status(client.post("/v1/label", json={"url": "http://a.test/",
                                                     "category": "news"})) == (403, "forbidden")


def test_a_token_guards_every_endpoint_but_health(dirs, store_path, tmp_path) -> None:
    token_file = tmp_path / "token"
    token_file.write_text(TOKEN + "\n")
    assert load_token(str(token_file)) == TOKEN
    config = ServeConfig(token=TOKEN)
    good = {"authorization": f"Bearer {TOKEN}"}
    with Triage.open(dirs["bundle"], store_path) as triage, running(triage, config) as base, \
            httpx.Client(base_url=base, timeout=10) as client:
        assert client.get("/v1/health").status_code == 200
        for path in ("/v1/version", "/metrics", "/openapi.json"):
            assert client.get(path).status_code == 401
            assert client.get(path, headers={"authorization": "Bearer wrong"}).status_code \
                == 401
            assert client.get(path, headers=good).status_code == 200
        assert client.get("/v1/classify", params={"url": "http://a.test/"}).status_code == 401
        labelled = client.post("/v1/label", headers=good,
                               json={"url": "http://Label-Me.example/", "category": "news"})
        assert labelled.status_code == 200, labelled.text
        assert client.post("/v1/label", headers=good, json={
            "url": "http://label-me.example/", "category": "no-such-category"}
        ).status_code == 422
        reloaded = client.post("/v1/reload", headers=good)
        assert reloaded.status_code == 200
        assert reloaded.json()["model_version"] == triage.model_version
        v = client.get("/v1/classify", params={"url": "http://label-me.example/"},
                       headers=good).json()
        assert (v["stage"], v["category"]) == ("label", "news")


def test_binding_beyond_loopback_needs_a_token(monkeypatch) -> None:
    monkeypatch.delenv("CASCADE_SERVE_TOKEN", raising=False)
    with pytest.raises(UsageError, match="bearer token"):
        ServeConfig(host="0.0.0.0")
    with pytest.raises(UsageError, match="bearer token"):
        ServeConfig(host="filter-box.internal.test")
    with pytest.raises(UsageError, match="16 characters"):
        ServeConfig(host="0.0.0.0", token="short")
    assert ServeConfig(host="0.0.0.0", token=TOKEN).token == TOKEN
    assert ServeConfig(host="::1").token is None  # loopback, IPv6
    monkeypatch.setenv("CASCADE_SERVE_TOKEN", TOKEN)
    assert load_token(None) == TOKEN


def test_metrics_are_openmetrics_text(dirs, store_path, scenario) -> None:
    # reference: prometheus_client's OpenMetrics parser (it rejects text that is not in
    # the OpenMetrics format, e.g. without the final "# EOF")
    from prometheus_client.openmetrics.parser import text_string_to_metric_families

    with Triage.open(dirs["bundle"], store_path) as triage, \
            running(triage, ServeConfig()) as base, httpx.Client(base_url=base,
                                                                timeout=10) as client:
        for u in scenario.urls[:30] + scenario.urls[:10]:
            client.get("/v1/classify", params={"url": u})
        triage.flush_queue()
        response = client.get("/metrics")
    assert response.headers["content-type"].startswith("application/openmetrics-text")
    families = {f.name: f for f in text_string_to_metric_families(response.text)}
    decided = sum(s.value for s in families["cascade_decisions"].samples
                  if s.name == "cascade_decisions_total")
    assert decided == 40
    cache = {s.labels["result"]: s.value for s in families["cascade_cache_lookups"].samples
             if s.name.endswith("_total")}
    assert cache["hit"] >= 10 and cache["hit"] + cache["miss"] == 40
    count = [s.value for s in families["cascade_decision_seconds"].samples
             if s.name == "cascade_decision_seconds_count"]
    assert count == [40]
    info = [s for s in families["cascade_model"].samples]
    assert info[0].labels["version"] == triage.model_version


def test_openapi_describes_every_route(dirs) -> None:
    from cascade.service_http import openapi

    spec = openapi(ServeConfig())
    assert spec["openapi"].startswith("3.1")
    assert set(spec["paths"]) == {"/v1/classify", "/v1/health", "/v1/version", "/metrics",
                                  "/v1/label", "/v1/reload"}
    json.dumps(spec)  # plain JSON


# --------------------------------------------------------------------------- under a night
def test_the_endpoint_keeps_serving_while_a_night_writes_the_same_store(tmp_path) -> None:
    """A real nightly job (child process) writes the store in many small batches while
    two client threads call the endpoint and the service writes its refine queue to the
    same file: no failed request, no 'database is locked'; the night's verdicts show."""
    sys.path.insert(0, str(HERE))
    import night_helpers as nh

    records = nh.scenario(seed=6, n_sites=120)
    nh.train_small_bundle(records, tmp_path / "model")
    nh.write_log(records, tmp_path / "log.csv")
    hosts = sorted({normalize(r.url).host for r in records})
    (tmp_path / "hosts.txt").write_text("\n".join(hosts))
    store = tmp_path / "night.sqlite"
    urls = [r.url for r in records[2 * len(records) // 3:]]
    # flagged by the service on an earlier day, not in tonight's log: the night takes them
    in_log = {normalize(u).url for u in urls}
    extra = list(dict.fromkeys(k for k in (normalize(r.url).url for r in records[:40])
                               if k not in in_log))[:3]
    with VerdictStore.open(store) as s:
        s.enqueue_refine((u, 5, "under-threshold") for u in extra)
    policy = TriagePolicy(store_check_s=0.05, queue_flush_s=0.05, queue_flush_at=5,
                          store_policy=StorePolicy(busy_timeout_s=30))
    failures: list[str] = []
    calls = [0]
    stop = threading.Event()
    with SiteFarm(records) as farm, \
            Triage.open(tmp_path / "model", store, policy, create_store=True) as triage, \
            running(triage, ServeConfig()) as base:
        def client_loop(k: int) -> None:
            with httpx.Client(base_url=base, timeout=30) as client:
                i = k
                while not stop.is_set():
                    try:
                        if i % 3:
                            r = client.get("/v1/classify", params={"url": urls[i % len(urls)]})
                        else:
                            r = client.post("/v1/classify",
                                            json={"urls": urls[i % 50:i % 50 + 25]})
                        if r.status_code != 200:
                            failures.append(f"{r.status_code} {r.text[:200]}")
                        calls[0] += 1
                    except httpx.HTTPError as exc:
                        failures.append(repr(exc))
                    i += 1

        clients = [threading.Thread(target=client_loop, args=(k,)) for k in range(2)]
        for t in clients:
            t.start()
        env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE.parent), str(HERE)])}
        night = subprocess.run(
            [sys.executable, str(HERE / "night_helpers.py"), str(tmp_path / "model"),
             str(store), str(tmp_path / "log.csv"), str(tmp_path / "out"), str(farm.port),
             str(tmp_path / "hosts.txt")], env=env, capture_output=True, timeout=300)
        time.sleep(0.3)  # a few more requests after the night's last write
        stop.set()
        for t in clients:
            t.join(60)
        assert night.returncode == 0, night.stderr.decode()[-2000:]
        assert b"locked" not in night.stderr
        refined = [v for v in triage.classify_many(urls) if v.stage == Stage.PAGE]
        stats = triage.stats()
    with VerdictStore.open(store, readonly=True) as s:
        assert all(s.get(u) is not None for u in extra)  # decided from the refine queue
        assert not set(extra) & set(dict(s.refine_queue()))  # and taken off it
    assert not failures, failures[:5]
    assert calls[0] > 20
    assert refined, "the night's page verdicts never reached the service"
    assert stats.queue_written > 0
