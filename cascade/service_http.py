"""The decision API over HTTP, for filtering services not written in Python
(``cascade serve``). Starlette for the application, uvicorn for the server: no
hand-written HTTP.

Endpoints (JSON in and out; ``/openapi.json`` describes them):

- ``GET /v1/classify?url=...`` and ``POST /v1/classify`` with ``{"url": ...}`` or
  ``{"urls": [...]}`` (at most ``max_batch``): verdicts; an unreadable URL in a batch gets
  an error object in its place, a single one a 422.
- ``GET /v1/health``: serving or not. ``GET /v1/version``: cascade and model versions.
- ``GET /metrics``: counters in the OpenMetrics text format (prometheus_client).
- ``POST /v1/label`` (``{"url", "category"}``) and ``POST /v1/reload``: always need the
  bearer token; without one configured they are refused (403).

Bound to 127.0.0.1 by default. Any other address needs a bearer token (from a file or the
environment), compared in constant time; with a token configured every endpoint but
``/v1/health`` asks for it. Request bodies are counted as they arrive and cut off at
``max_body_bytes`` (413), whatever Content-Length says.
"""

from __future__ import annotations

import hmac
import ipaddress
import json
import logging
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cascade import __version__
from cascade.errors import CascadeError, InvalidURL, UsageError
from cascade.service import LATENCY_BUCKETS_S, Triage, TriageStats
from cascade.verdict import Verdict

__all__ = ["TOKEN_ENV", "ServeConfig", "build_app", "load_token", "openapi", "serve"]

log = logging.getLogger("cascade.serve")

#: The environment variable a token may come from (``--token-file`` takes precedence).
TOKEN_ENV = "CASCADE_SERVE_TOKEN"


@dataclass(frozen=True)
class ServeConfig:
    """Limits and access of the HTTP endpoint."""

    host: str = "127.0.0.1"
    port: int = 8787
    token: str | None = None
    max_body_bytes: int = 1 << 20
    max_batch: int = 10_000
    max_concurrency: int = 256  # connections and requests at once; past it, 503
    access_log: bool = False

    def __post_init__(self) -> None:
        if not 0 <= self.port <= 65535:
            raise UsageError(f"port must be within 0-65535, got {self.port}")
        if self.max_body_bytes < 1024 or self.max_batch < 1 or self.max_concurrency < 1:
            raise UsageError("max_body_bytes must be at least 1024, max_batch and "
                             "max_concurrency at least 1")
        if self.token is not None and len(self.token) < 16:
            raise UsageError("the bearer token must be at least 16 characters")
        if not is_loopback(self.host) and self.token is None:
            raise UsageError(
                f"binding {self.host} exposes the API beyond this machine: give a bearer "
                f"token (--token-file FILE, or the {TOKEN_ENV} environment variable)")


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False  # a host name: it may resolve anywhere


def load_token(token_file: str | None) -> str | None:
    """The token from ``token_file`` (first line, stripped), else from ``TOKEN_ENV``."""
    if token_file:
        try:
            text = Path(token_file).read_text(encoding="utf-8")
        except OSError as exc:
            raise UsageError(f"{token_file}: cannot read the token file ({exc})") from None
        token = text.strip().splitlines()[0].strip() if text.strip() else ""
        if not token:
            raise UsageError(f"{token_file}: the token file is empty")
        return token
    return os.environ.get(TOKEN_ENV) or None


class _HttpError(Exception):
    def __init__(self, status: int, code: str, detail: str) -> None:
        super().__init__(detail)
        self.status, self.code, self.detail = status, code, detail


def _verdict_json(v: Verdict, given: str) -> dict[str, Any]:
    return {"input": given, **v.to_dict()}


def build_app(triage: Triage, config: ServeConfig | None = None) -> Any:
    """The Starlette application serving ``triage`` under ``config``."""
    from starlette.applications import Starlette
    from starlette.requests import Request
    from starlette.responses import JSONResponse, Response
    from starlette.routing import Route

    config = config or ServeConfig()
    token = config.token.encode() if config.token else None
    metrics = _metrics_renderer(triage)

    def error(status: int, code: str, detail: str) -> JSONResponse:
        return JSONResponse({"error": code, "detail": detail}, status_code=status)

    def check_token(request: Request, always: bool) -> None:
        if token is None:
            if always:
                raise _HttpError(403, "forbidden", "this endpoint needs a bearer token, and "
                                 "the server was started without one")
            return
        given = request.headers.get("authorization", "")
        scheme, _, value = given.partition(" ")
        if scheme.lower() != "bearer" or not hmac.compare_digest(value.strip().encode(),
                                                                 token):
            raise _HttpError(401, "unauthorized", "missing or wrong bearer token")

    async def body_json(request: Request) -> Any:
        length = request.headers.get("content-length")
        if length and length.isdigit() and int(length) > config.max_body_bytes:
            raise _HttpError(413, "too-large", f"request body over {config.max_body_bytes} "
                             "bytes")
        chunks, size = [], 0
        async for chunk in request.stream():  # counted as it arrives, not as announced
            size += len(chunk)
            if size > config.max_body_bytes:
                raise _HttpError(413, "too-large",
                                 f"request body over {config.max_body_bytes} bytes")
            chunks.append(chunk)
        ctype = request.headers.get("content-type", "")
        if ctype.split(";")[0].strip().lower() not in ("application/json", ""):
            raise _HttpError(415, "unsupported-media-type", "send application/json")
        try:
            return json.loads(b"".join(chunks).decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise _HttpError(400, "bad-json", f"the body is not JSON: {exc}") from None

    def guarded(handler: Callable[[Request], Any], always_token: bool = False,
                token_needed: bool = True) -> Callable[[Request], Any]:
        async def endpoint(request: Request) -> Response:
            started = time.perf_counter()
            try:
                if token_needed:
                    check_token(request, always_token)
                response = await handler(request)
            except _HttpError as exc:
                response = error(exc.status, exc.code, exc.detail)
            except UsageError as exc:
                response = error(422, "invalid", str(exc))
            except CascadeError as exc:  # a model or store that cannot be read
                log.warning("request failed: %s", exc)
                response = error(503, "unavailable", str(exc))
            if config.access_log:
                log.info(json.dumps({"event": "request", "method": request.method,
                                     "path": request.url.path,
                                     "status": response.status_code,
                                     "ms": round((time.perf_counter() - started) * 1e3, 3)}))
            return response
        return endpoint

    async def classify(request: Request) -> Response:
        if request.method == "GET":
            url = request.query_params.get("url")
            if url is None:
                raise _HttpError(422, "invalid", "give ?url=...")
            return JSONResponse(_one(url))
        payload = await body_json(request)
        if not isinstance(payload, dict) or ("url" in payload) == ("urls" in payload):
            raise _HttpError(422, "invalid", 'send {"url": "..."} or {"urls": ["...", ...]}')
        if "url" in payload:
            if not isinstance(payload["url"], str):
                raise _HttpError(422, "invalid", '"url" must be a string')
            return JSONResponse(_one(payload["url"]))
        urls = payload["urls"]
        if not isinstance(urls, list) or not all(isinstance(u, str) for u in urls):
            raise _HttpError(422, "invalid", '"urls" must be a list of strings')
        if len(urls) > config.max_batch:
            raise _HttpError(413, "too-large", f"{len(urls)} URLs; at most "
                             f"{config.max_batch} per request")
        results = await triage.aclassify_many(urls, errors="keep")
        out = [_verdict_json(r, u) if isinstance(r, Verdict) else
               {"input": u, "error": "invalid-url", "detail": r.reason}
               for u, r in zip(urls, results, strict=True)]
        return JSONResponse({"verdicts": out, "model_version": triage.model_version})

    def _one(url: str) -> dict[str, Any]:
        try:
            return _verdict_json(triage.classify(url), url)
        except InvalidURL as exc:
            raise _HttpError(422, "invalid-url", exc.reason) from None

    async def health(request: Request) -> Response:
        return JSONResponse({"status": "ok", "model_version": triage.model_version})

    async def version(request: Request) -> Response:
        return JSONResponse({"cascade": __version__, "model_version": triage.model_version,
                             "classes": list(triage.classes),
                             "store": str(triage.store_path) if triage.store_path else None})

    async def metrics_endpoint(request: Request) -> Response:
        body, ctype = metrics()
        return Response(body, media_type=ctype)

    async def label(request: Request) -> Response:
        payload = await body_json(request)
        if not isinstance(payload, dict) or not all(
                isinstance(payload.get(k), str) and payload.get(k) for k in ("url", "category")):
            raise _HttpError(422, "invalid", 'send {"url": "...", "category": "..."}')
        if payload["category"] not in triage.classes:
            raise _HttpError(422, "invalid", f"unknown category {payload['category']!r}; "
                             f"one of {list(triage.classes)}")
        analyst = payload.get("analyst") or "analyst"
        if not isinstance(analyst, str) or len(analyst) > 200:
            raise _HttpError(422, "invalid", '"analyst" must be a short string')
        if triage.store_path is None:
            raise _HttpError(409, "no-store", "the server was started without a store")
        from cascade.store import VerdictStore
        from cascade.urls import normalize

        try:
            key = normalize(payload["url"])
        except InvalidURL as exc:
            raise _HttpError(422, "invalid-url", exc.reason) from None
        with VerdictStore.open(triage.store_path, policy=triage.policy.store_policy) as store:
            store.label(key.url, payload["category"], analyst=analyst,
                        domain=key.registered_domain)
        log.info(json.dumps({"event": "label", "url": key.url,
                             "category": payload["category"], "analyst": analyst}))
        return JSONResponse({"labelled": key.url, "category": payload["category"]})

    async def reload(request: Request) -> Response:
        import asyncio

        try:
            version = await asyncio.to_thread(triage.reload)
        except CascadeError as exc:
            raise _HttpError(409, "reload-failed", f"still serving {triage.model_version}: "
                             f"{exc}") from None
        return JSONResponse({"model_version": version})

    async def openapi_endpoint(request: Request) -> Response:
        return JSONResponse(openapi(config))

    async def not_found(request: Request, exc: Exception) -> Response:
        return error(404, "not-found", f"no endpoint {request.url.path}; see /openapi.json")

    async def not_allowed(request: Request, exc: Exception) -> Response:
        return error(405, "method-not-allowed", f"{request.method} is not allowed here")

    routes = [
        Route("/v1/classify", guarded(classify), methods=["GET", "POST"]),
        Route("/v1/health", guarded(health, token_needed=False), methods=["GET"]),
        Route("/v1/version", guarded(version), methods=["GET"]),
        Route("/metrics", guarded(metrics_endpoint), methods=["GET"]),
        Route("/v1/label", guarded(label, always_token=True), methods=["POST"]),
        Route("/v1/reload", guarded(reload, always_token=True), methods=["POST"]),
        Route("/openapi.json", guarded(openapi_endpoint), methods=["GET"]),
    ]
    return Starlette(routes=routes, exception_handlers={404: not_found, 405: not_allowed})


def _metrics_renderer(triage: Triage) -> Callable[[], tuple[bytes, str]]:
    """OpenMetrics text of the triage's counters, rendered by prometheus_client."""
    from prometheus_client import CollectorRegistry
    from prometheus_client.core import (
        CounterMetricFamily,
        GaugeMetricFamily,
        HistogramMetricFamily,
        InfoMetricFamily,
    )
    from prometheus_client.openmetrics.exposition import CONTENT_TYPE_LATEST, generate_latest

    class _Collector:
        def collect(self) -> Any:
            s: TriageStats = triage.stats()
            decisions = CounterMetricFamily(
                "cascade_decisions", "Decisions by stage, reason and source",
                labels=["stage", "reason", "source"])
            for (stage, reason, source), n in sorted(s.decisions.items()):
                decisions.add_metric([stage, reason, source], n)
            yield decisions
            yield CounterMetricFamily("cascade_invalid_urls", "URLs that could not be read",
                                      value=s.invalid_urls)
            cache = CounterMetricFamily("cascade_cache_lookups", "Decision cache lookups",
                                        labels=["result"])
            cache.add_metric(["hit"], s.cache_hits)
            cache.add_metric(["miss"], s.cache_misses)
            yield cache
            buckets = [(repr(b), c) for b, c in zip(LATENCY_BUCKETS_S, s.latency_buckets,
                                                    strict=False)]
            buckets.append(("+Inf", s.latency_buckets[-1]))
            yield HistogramMetricFamily("cascade_decision_seconds",
                                        "Time to decide one URL, in process",
                                        buckets=buckets, sum_value=s.latency_sum_s,
                                        unit="seconds")
            yield GaugeMetricFamily("cascade_refine_pending",
                                    "URLs waiting in memory for the refine queue",
                                    value=s.queue_pending)
            yield CounterMetricFamily("cascade_refine_dropped",
                                      "URLs not queued because the memory bound was reached",
                                      value=s.queue_dropped)
            yield CounterMetricFamily("cascade_refine_written",
                                      "Refine-queue entries written to the store",
                                      value=s.queue_written)
            if s.queue_length is not None:
                yield GaugeMetricFamily("cascade_refine_queue_length",
                                        "URLs in the store's refine queue at the last write",
                                        value=s.queue_length)
            reloads = CounterMetricFamily("cascade_model_reloads", "Reloads by result",
                                          labels=["result"])
            reloads.add_metric(["ok"], s.reloads)
            reloads.add_metric(["failed"], s.reload_failures)
            yield reloads
            info = InfoMetricFamily("cascade_model", "The model serving decisions")
            info.add_metric([], {"version": s.model_version, "cascade": __version__})
            yield info

    registry = CollectorRegistry(auto_describe=False)
    registry.register(_Collector())  # type: ignore[arg-type]
    return lambda: (generate_latest(registry), CONTENT_TYPE_LATEST)


def openapi(config: ServeConfig) -> dict[str, Any]:
    """The OpenAPI 3.1 description of the endpoint."""
    verdict = {
        "type": "object",
        "required": ["input", "url", "category", "confidence", "top", "stage",
                     "needs_fetch", "reason", "model_version", "decided_at"],
        "properties": {
            "input": {"type": "string", "description": "the URL as sent"},
            "url": {"type": "string", "description": "the normalized URL"},
            "category": {"type": "string"},
            "confidence": {"type": "number", "minimum": 0, "maximum": 1,
                           "description": "calibrated probability of category"},
            "top": {"type": "array", "items": {"type": "array", "prefixItems": [
                {"type": "string"}, {"type": "number"}]}},
            "stage": {"type": "string", "enum": ["url", "page", "label"]},
            "needs_fetch": {"type": "boolean",
                            "description": "worth a page fetch tonight (queued)"},
            "reason": {"type": "string"},
            "model_version": {"type": "string"},
            "decided_at": {"type": "string", "format": "date-time"},
        },
    }
    err = {"type": "object", "required": ["error", "detail"],
           "properties": {"error": {"type": "string"}, "detail": {"type": "string"}}}
    item_error = {"type": "object", "required": ["input", "error", "detail"],
                  "properties": {"input": {"type": "string"}, "error": {"const": "invalid-url"},
                                 "detail": {"type": "string"}}}

    def answer(schema: dict[str, Any], *codes: int) -> dict[str, Any]:
        out: dict[str, Any] = {"200": {"description": "OK", "content": {
            "application/json": {"schema": schema}}}}
        for code in codes:
            out[str(code)] = {"description": "error", "content": {
                "application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}}
        return out

    batch = {"type": "object", "properties": {
        "verdicts": {"type": "array", "items": {"oneOf": [
            {"$ref": "#/components/schemas/Verdict"},
            {"$ref": "#/components/schemas/ItemError"}]}},
        "model_version": {"type": "string"}}}
    body = {"required": True, "content": {"application/json": {"schema": {"oneOf": [
        {"type": "object", "required": ["url"], "properties": {"url": {"type": "string"}}},
        {"type": "object", "required": ["urls"], "properties": {"urls": {
            "type": "array", "items": {"type": "string"}, "maxItems": config.max_batch}}},
    ]}}}}
    secured = [{"bearer": []}] if config.token else []
    return {
        "openapi": "3.1.0",
        "info": {"title": "cascade decision API", "version": __version__,
                 "description": "Acceptable-use categories for URLs, with calibrated "
                                "confidence. Categories are probabilities; what to block "
                                "is the policy owner's decision."},
        "components": {
            "schemas": {"Verdict": verdict, "Error": err, "ItemError": item_error},
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
        },
        "security": secured,
        "paths": {
            "/v1/classify": {
                "get": {"summary": "Verdict for one URL",
                        "parameters": [{"name": "url", "in": "query", "required": True,
                                        "schema": {"type": "string"}}],
                        "responses": answer({"$ref": "#/components/schemas/Verdict"},
                                            401, 422)},
                "post": {"summary": "Verdict for one URL, or for a batch",
                         "requestBody": body,
                         "responses": answer({"oneOf": [
                             {"$ref": "#/components/schemas/Verdict"}, batch]},
                             400, 401, 413, 415, 422)},
            },
            "/v1/health": {"get": {"summary": "Serving or not", "security": [],
                                   "responses": answer({"type": "object"})}},
            "/v1/version": {"get": {"summary": "cascade and model versions",
                                    "responses": answer({"type": "object"}, 401)}},
            "/metrics": {"get": {"summary": "Counters, OpenMetrics text format",
                                 "responses": {"200": {"description": "OK", "content": {
                                     "application/openmetrics-text": {
                                         "schema": {"type": "string"}}}}}}},
            "/v1/label": {"post": {
                "summary": "Record an analyst's label (wins over model verdicts)",
                "security": [{"bearer": []}],
                "requestBody": {"required": True, "content": {"application/json": {
                    "schema": {"type": "object", "required": ["url", "category"],
                               "properties": {"url": {"type": "string"},
                                              "category": {"type": "string"},
                                              "analyst": {"type": "string"}}}}}},
                "responses": answer({"type": "object"}, 401, 403, 409, 422)}},
            "/v1/reload": {"post": {
                "summary": "Read the model directory and the store again",
                "security": [{"bearer": []}],
                "responses": answer({"type": "object"}, 401, 403, 409)}},
        },
    }


def serve(triage: Triage, config: ServeConfig, sockets: list[Any] | None = None) -> None:
    """Serve until interrupted (SIGINT/SIGTERM end it cleanly)."""
    import uvicorn

    app = build_app(triage, config)
    server = uvicorn.Server(uvicorn.Config(
        app, host=config.host, port=config.port, http="h11", loop="asyncio",
        lifespan="off", access_log=False, log_level="warning", server_header=False,
        limit_concurrency=config.max_concurrency, timeout_keep_alive=5,
        h11_max_incomplete_event_size=16 << 10))
    log.info(json.dumps({"event": "serving", "host": config.host, "port": config.port,
                         "model_version": triage.model_version,
                         "store": str(triage.store_path) if triage.store_path else None}))
    server.run(sockets=sockets)
