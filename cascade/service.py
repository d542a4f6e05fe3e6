"""The decision API a filtering service embeds: one question per request, answered in
microseconds, in process.

``Triage.open(model_dir, store_path)`` loads the model bundle and opens the verdict store.
``classify(url)`` answers from the store when it knows the URL (an analyst's label or a
page verdict), else from the registered domain's stored verdict (``domain_fallback``), else
from the URL model; a verdict under ``fetch_below`` is marked ``needs_fetch`` and its URL
goes, with its lookup count, to the store's durable refine queue that the nightly job
reads. ``classify_many`` is the vectorized form; ``aclassify``/``aclassify_many`` the async
twins.

Thread-safe: each thread reads the store through its own read-only connection (SQLite WAL:
the nightly job's writes never block a read, and a read sees only whole batches). The
model and the store can be swapped while requests are served (``reload``): the new bundle
is loaded and checked first, then one reference is replaced, so a request sees the old
state or the new one, never half of each; every verdict names the model that decided it.

Categories are probabilities: what to block, and at which confidence, is the policy
owner's decision, not this module's.
"""

from __future__ import annotations

import asyncio
import bisect
import logging
import threading
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from cascade.bundle import ModelBundle
from cascade.errors import InvalidURL, StoreError, UsageError
from cascade.store import StoredVerdict, StorePolicy, VerdictStore
from cascade.urls import UrlKey, normalize
from cascade.verdict import Reason, Stage, Verdict

__all__ = ["LATENCY_BUCKETS_S", "Source", "Triage", "TriagePolicy", "TriageStats"]

log = logging.getLogger("cascade.service")

#: Upper bounds of the decision-latency histogram, in seconds (plus +Inf).
LATENCY_BUCKETS_S = (10e-6, 25e-6, 50e-6, 100e-6, 250e-6, 500e-6, 1e-3, 2.5e-3, 10e-3,
                     100e-3)


class Source:
    """Where a decision came from (a label on the decision counters)."""

    STORE = "store"  # the store's verdict for this very URL
    DOMAIN = "domain"  # the store's verdict for the URL's registered domain
    MODEL = "model"  # the URL model


@dataclass(frozen=True)
class TriagePolicy:
    """How ``Triage`` decides and how much it keeps in memory.

    ``fetch_below``: a verdict under this confidence is ``needs_fetch`` and is queued for
    the nightly job (the same threshold as ``cascade night --fetch-below``).
    ``domain_fallback``: a URL the store does not know takes its registered domain's
    stored verdict (page or label stage), reason ``domain``.
    ``cache_size``: decisions kept in memory (about 1 KiB each); the cache is dropped when
    the model is reloaded or the store's verdicts change (checked every ``store_check_s``).
    ``queue_max``: distinct URLs waiting in memory for the refine queue; past it, further
    URLs are counted as dropped (never an error for the caller). They are written to the
    store every ``queue_flush_s`` seconds, or sooner once ``queue_flush_at`` are waiting.
    """

    fetch_below: float = 0.8
    domain_fallback: bool = True
    top_k: int = 3
    cache_size: int = 65_536
    store_check_s: float = 1.0
    queue: bool = True
    queue_max: int = 100_000
    queue_flush_s: float = 2.0
    queue_flush_at: int = 1_000
    store_policy: StorePolicy = field(default_factory=StorePolicy)

    def __post_init__(self) -> None:
        if not 0.0 <= self.fetch_below <= 1.0:
            raise UsageError(f"fetch_below must be within [0, 1], got {self.fetch_below}")
        for name in ("top_k", "queue_max", "queue_flush_at"):
            if int(getattr(self, name)) < 1:
                raise UsageError(f"{name} must be at least 1, got {getattr(self, name)}")
        if self.cache_size < 0:
            raise UsageError(f"cache_size must be 0 (off) or more, got {self.cache_size}")
        for name in ("store_check_s", "queue_flush_s"):
            if not float(getattr(self, name)) > 0:
                raise UsageError(f"{name} must be positive, got {getattr(self, name)}")


@dataclass(frozen=True)
class TriageStats:
    """A snapshot of the counters a service team watches (``Triage.stats()``)."""

    decisions: Mapping[tuple[str, str, str], int]  # (stage, reason, source) -> count
    invalid_urls: int
    cache_hits: int
    cache_misses: int
    latency_buckets: tuple[int, ...]  # cumulative counts per LATENCY_BUCKETS_S, then +Inf
    latency_sum_s: float
    queue_pending: int
    queue_dropped: int
    queue_written: int
    queue_length: int | None  # the store's refine queue at the last flush
    model_version: str
    store: str | None
    reloads: int
    reload_failures: int
    started_at: float

    @property
    def decisions_total(self) -> int:
        return sum(self.decisions.values())


@dataclass(frozen=True)
class _State:
    """What one request decides with: swapped whole by ``reload``."""

    bundle: ModelBundle
    model_dir: Path
    store_path: Path | None
    generation: int
    classes: tuple[str, ...]
    version: str


class _Cache:
    """A bounded map of recent decisions in two generations: a hit in the old generation
    moves to the new one, and when the new one is full the old one is dropped. Close to
    LRU, with no lock: each step is one dict operation, atomic under the GIL."""

    def __init__(self, size: int) -> None:
        self.half = max(1, size // 2) if size else 0
        self.new: dict[str, tuple[Verdict, str]] = {}
        self.old: dict[str, tuple[Verdict, str]] = {}

    def get(self, key: str) -> tuple[Verdict, str] | None:
        if not self.half:
            return None
        hit = self.new.get(key)
        if hit is None:
            hit = self.old.get(key)
            if hit is not None:
                self.put(key, hit)
        return hit

    def put(self, key: str, value: tuple[Verdict, str]) -> None:
        if not self.half:
            return
        if len(self.new) >= self.half:
            self.old, self.new = self.new, {}
        self.new[key] = value

    def clear(self) -> None:
        self.new, self.old = {}, {}


class _Stats:
    """Counters behind ``TriageStats``; one lock, held for a few dictionary updates."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.decisions: dict[tuple[str, str, str], int] = {}
        self.invalid = 0
        self.hits = 0
        self.misses = 0
        self.buckets = [0] * (len(LATENCY_BUCKETS_S) + 1)
        self.latency_sum = 0.0
        self.reloads = 0
        self.reload_failures = 0
        self.started = time.time()

    def record(self, verdict: Verdict, source: str, hit: bool, seconds: float) -> None:
        key = (verdict.stage.value if isinstance(verdict.stage, Stage) else str(verdict.stage),
               str(verdict.reason), source)
        slot = bisect.bisect_left(LATENCY_BUCKETS_S, seconds)
        with self.lock:
            self.decisions[key] = self.decisions.get(key, 0) + 1
            if hit:
                self.hits += 1
            else:
                self.misses += 1
            self.buckets[slot] += 1
            self.latency_sum += seconds


class _RefineQueue:
    """URLs worth a fetch tonight, with their lookup counts, held in memory (bounded) and
    written to the store's refine queue by one background thread."""

    def __init__(self, store_path: Path, policy: TriagePolicy) -> None:
        self.store_path = store_path
        self.policy = policy
        self.lock = threading.Lock()
        self.pending: dict[str, list] = {}
        self.dropped = 0
        self.written = 0
        self.length: int | None = None
        self.wake = threading.Event()
        self.stopping = False
        self.thread = threading.Thread(target=self._run, name="cascade-refine-queue",
                                       daemon=True)
        self.thread.start()

    def add(self, url: str, reason: str) -> None:
        with self.lock:
            entry = self.pending.get(url)
            if entry is not None:
                entry[0] += 1
                return
            if len(self.pending) >= self.policy.queue_max:
                self.dropped += 1
                return
            self.pending[url] = [1, reason]
            full = len(self.pending) >= self.policy.queue_flush_at
        if full:
            self.wake.set()

    def flush(self) -> int:
        with self.lock:
            batch, self.pending = self.pending, {}
        if not batch:
            return 0
        try:
            with VerdictStore.open(self.store_path, policy=self.policy.store_policy) as store:
                n = store.enqueue_refine((u, c, r) for u, (c, r) in batch.items())
                self.length = store.queue_length()
        except Exception as exc:  # noqa: BLE001 - a store that cannot be written: keep serving
            log.warning("refine queue: could not write %d URLs to %s: %s; kept in memory",
                        len(batch), self.store_path, exc)
            with self.lock:  # put them back, within the bound
                for url, (count, reason) in batch.items():
                    entry = self.pending.get(url)
                    if entry is not None:
                        entry[0] += count
                    elif len(self.pending) < self.policy.queue_max:
                        self.pending[url] = [count, reason]
                    else:
                        self.dropped += 1
            return 0
        self.written += n
        return n

    def _run(self) -> None:
        while not self.stopping:
            self.wake.wait(self.policy.queue_flush_s)
            self.wake.clear()
            self.flush()

    def close(self) -> None:
        self.stopping = True
        self.wake.set()
        self.thread.join(timeout=30)
        self.flush()


class Triage:
    """Decide a URL's category in process: the store first, then the URL model.

    Open with ``Triage.open``; close with ``close`` (or use as a context manager), which
    writes what is still waiting for the refine queue."""

    def __init__(self, state: _State, policy: TriagePolicy) -> None:
        self.policy = policy
        self._state = state
        self._local = threading.local()
        self._cache = _Cache(policy.cache_size)
        self._stats = _Stats()
        self._reload_lock = threading.Lock()
        self._watch_lock = threading.Lock()
        self._next_check = 0.0
        self._store_mark: int | None = None
        self._queue: _RefineQueue | None = None
        self._closed = False
        self._now_s = 0
        self._now_text = ""
        if state.store_path is not None and policy.queue:
            self._queue = _RefineQueue(state.store_path, policy)

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(cls, model_dir: str | Path, store_path: str | Path | None = None,
             policy: TriagePolicy | None = None, *, create_store: bool = False) -> Triage:
        """Load the bundle at ``model_dir`` (every digest checked) and open the store at
        ``store_path`` (None: decide from the model alone). A store that does not exist is
        an error unless ``create_store`` (a typo in a path must not start an empty store)."""
        policy = policy or TriagePolicy()
        state = cls._load(Path(model_dir), _store_path(store_path, policy, create_store), 1)
        return cls(state, policy)

    @staticmethod
    def _load(model_dir: Path, store_path: Path | None, generation: int) -> _State:
        bundle = ModelBundle.load(model_dir)
        bundle.url_model.predict_proba_one("http://warm-up.test/")  # build lookup tables now
        if store_path is not None:  # readable, and a store of this schema
            VerdictStore.open(store_path, readonly=True).close()
        return _State(bundle, model_dir, store_path, generation, tuple(bundle.classes),
                      bundle.version)

    def reload(self, model_dir: str | Path | None = None,
               store_path: str | Path | None = None) -> str:
        """Swap in a model directory and/or a store (default: read the current ones
        again, e.g. after ``cascade train`` replaced the directory). The new state is
        loaded and checked before the swap; if that fails the old one keeps serving and
        the error is raised. Returns the model version now serving."""
        with self._reload_lock:
            old = self._state
            new_store = old.store_path if store_path is None else \
                _store_path(store_path, self.policy, create=False)
            try:
                state = self._load(Path(model_dir) if model_dir else old.model_dir, new_store,
                                   old.generation + 1)
            except BaseException:
                with self._stats.lock:
                    self._stats.reload_failures += 1
                raise
            if new_store != old.store_path and self._queue is not None:
                self._queue.close()
                self._queue = None
            if new_store is not None and self._queue is None and self.policy.queue:
                self._queue = _RefineQueue(new_store, self.policy)
            self._state = state  # one reference: a request sees the old or the new
            self._cache.clear()
            self._store_mark = None
            with self._stats.lock:
                self._stats.reloads += 1
            log.info("serving model %s (store %s)", state.version, state.store_path)
            return state.version

    @property
    def model_version(self) -> str:
        return self._state.version

    @property
    def store_path(self) -> Path | None:
        return self._state.store_path

    @property
    def classes(self) -> tuple[str, ...]:
        return self._state.classes

    def close(self) -> None:
        """Write the waiting refine-queue entries and stop the background writer."""
        if self._closed:
            return
        self._closed = True
        if self._queue is not None:
            self._queue.close()

    def __enter__(self) -> Triage:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ the store
    def _reader(self, state: _State) -> VerdictStore | None:
        """This thread's read-only connection to the state's store."""
        if state.store_path is None:
            return None
        local = self._local
        store = getattr(local, "store", None)
        if store is None or local.generation != state.generation:
            if store is not None:
                store.close()
            store = VerdictStore.open(state.store_path, policy=self.policy.store_policy,
                                      readonly=True)
            local.store, local.generation = store, state.generation
        return store

    def _watch_store(self, state: _State, now: float) -> None:
        """Drop the cache when the store's verdicts changed (history only grows)."""
        if now < self._next_check or not self._watch_lock.acquire(blocking=False):
            return
        try:
            self._next_check = now + self.policy.store_check_s
            store = self._reader(state)
            if store is None:
                return
            mark = store.change_mark()
            if self._store_mark is not None and mark != self._store_mark:
                self._cache.clear()
            self._store_mark = mark
        finally:
            self._watch_lock.release()

    # ------------------------------------------------------------------ deciding
    def _stamp(self) -> str:
        now = int(time.time())
        if now != self._now_s:
            self._now_text = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(now))
            self._now_s = now
        return self._now_text

    def _from_store(self, stored: StoredVerdict, key: UrlKey, exact: bool) -> Verdict:
        v = stored.verdict
        fresh = self.policy.store_policy.is_fresh(str(v.stage), stored.decided_ts)
        reason = v.reason if exact else Reason.DOMAIN
        if not fresh:
            reason = Reason.STALE
        needs = (not fresh) or (v.stage != Stage.LABEL
                                and v.confidence < self.policy.fetch_below)
        return Verdict(url=key.url, category=v.category, confidence=v.confidence, top=v.top,
                       stage=v.stage, needs_fetch=needs, reason=reason,
                       model_version=v.model_version, decided_at=v.decided_at)

    def _from_model(self, state: _State, key: UrlKey, proba: np.ndarray) -> Verdict:
        row = proba.tolist()  # a handful of classes: plain floats sort faster than numpy
        k = min(self.policy.top_k, len(row))
        order = sorted(range(len(row)), key=row.__getitem__, reverse=True)[:k]
        conf = row[order[0]]
        needs = conf < self.policy.fetch_below
        classes = state.classes
        return Verdict(url=key.url, category=classes[order[0]], confidence=conf,
                       top=tuple([(classes[j], row[j]) for j in order]),
                       stage=Stage.URL, needs_fetch=needs,
                       reason=Reason.UNDER_THRESHOLD if needs else Reason.CONFIDENT,
                       model_version=state.version, decided_at=self._stamp())

    def _lookup(self, state: _State, key: UrlKey) -> tuple[Verdict | None, str]:
        store = self._reader(state)
        if store is None:
            return None, Source.MODEL
        found = store.known(key.url, key.registered_domain if self.policy.domain_fallback
                            else None)
        if found is None:
            return None, Source.MODEL
        stored, exact = found
        return self._from_store(stored, key, exact), Source.STORE if exact else Source.DOMAIN

    def classify(self, url: str) -> Verdict:
        """The verdict for one URL. Raises ``InvalidURL`` for a string that is not a URL
        cascade can read (the caller decides what an unreadable URL means for its policy)."""
        started = time.perf_counter()
        state = self._state
        self._watch_store(state, started)
        cached = self._cache.get(url)
        if cached is None:
            try:
                key = normalize(url)
            except InvalidURL:
                with self._stats.lock:
                    self._stats.invalid += 1
                raise
            hit_verdict, source = self._lookup(state, key)
            if hit_verdict is None:
                hit_verdict = self._from_model(
                    state, key, state.bundle.url_model.predict_proba_one(key))
            if state is self._state:
                self._cache.put(url, (hit_verdict, source))
            self._after(hit_verdict, source, False, started)
            return hit_verdict
        self._after(cached[0], cached[1], True, started)
        return cached[0]

    def _after(self, verdict: Verdict, source: str, hit: bool, started: float) -> None:
        if verdict.needs_fetch and self._queue is not None:
            self._queue.add(verdict.url, str(verdict.reason))
        self._stats.record(verdict, source, hit, time.perf_counter() - started)

    def classify_many(self, urls: Sequence[str], *, errors: str = "raise"
                      ) -> list[Verdict | InvalidURL]:
        """Verdicts for many URLs at once: the store read in batches, the model over all
        the rest in one matrix product. ``errors="raise"`` raises ``InvalidURL`` for the
        first unreadable URL; ``errors="keep"`` puts the ``InvalidURL`` in its place."""
        if errors not in ("raise", "keep"):
            raise UsageError(f"errors must be 'raise' or 'keep', not {errors!r}")
        started = time.perf_counter()
        state = self._state
        self._watch_store(state, started)
        n = len(urls)
        out: list[Any] = [None] * n
        sources: list[str] = [Source.MODEL] * n
        hits = [False] * n
        todo: list[tuple[int, UrlKey]] = []
        for i, url in enumerate(urls):
            cached = self._cache.get(url) if isinstance(url, str) else None
            if cached is not None:
                (out[i], sources[i]), hits[i] = cached, True
                continue
            try:
                if not isinstance(url, str):
                    raise InvalidURL(repr(url)[:200], "not a string")
                todo.append((i, normalize(url)))
            except InvalidURL as exc:
                with self._stats.lock:
                    self._stats.invalid += 1
                if errors == "raise":
                    raise
                out[i] = exc
        store = self._reader(state)
        model_rows: list[tuple[int, UrlKey]] = []
        if store is not None and todo:
            known = store.known_many([k.url for _, k in todo],
                                     [k.registered_domain for _, k in todo]
                                     if self.policy.domain_fallback else None)
            for i, key in todo:
                found = known.get(key.url)
                if found is None:
                    model_rows.append((i, key))
                else:
                    out[i] = self._from_store(found[0], key, found[1])
                    sources[i] = Source.STORE if found[1] else Source.DOMAIN
        else:
            model_rows = todo
        if model_rows:
            proba = state.bundle.url_proba([k for _, k in model_rows])
            for (i, key), row in zip(model_rows, proba, strict=True):
                out[i] = self._from_model(state, key, row)
        fresh_ok = state is self._state
        per = (time.perf_counter() - started) / max(1, n)
        for i, v in enumerate(out):
            if isinstance(v, Verdict):
                if not hits[i] and fresh_ok:
                    self._cache.put(urls[i], (v, sources[i]))
                if v.needs_fetch and self._queue is not None:
                    self._queue.add(v.url, str(v.reason))
                self._stats.record(v, sources[i], hits[i], per)
        return out

    async def aclassify(self, url: str) -> Verdict:
        """``classify`` for async callers. It runs inline: a decision is CPU work of tens
        of microseconds and a read of a local file, shorter than a hop to a thread."""
        return self.classify(url)

    async def aclassify_many(self, urls: Sequence[str], *, errors: str = "raise"
                             ) -> list[Verdict | InvalidURL]:
        """``classify_many`` for async callers: small batches inline, larger ones in a
        worker thread so the event loop keeps serving."""
        if len(urls) <= 64:
            return self.classify_many(urls, errors=errors)
        return await asyncio.to_thread(self.classify_many, urls, errors=errors)

    # ------------------------------------------------------------------ operations
    def flush_queue(self) -> int:
        """Write the waiting refine-queue entries now; returns how many were written."""
        return self._queue.flush() if self._queue is not None else 0

    def stats(self) -> TriageStats:
        s = self._stats
        q = self._queue
        with s.lock:
            cumulative, total = [], 0
            for count in s.buckets:
                total += count
                cumulative.append(total)
            return TriageStats(
                decisions=dict(s.decisions), invalid_urls=s.invalid, cache_hits=s.hits,
                cache_misses=s.misses, latency_buckets=tuple(cumulative),
                latency_sum_s=s.latency_sum,
                queue_pending=len(q.pending) if q else 0, queue_dropped=q.dropped if q else 0,
                queue_written=q.written if q else 0, queue_length=q.length if q else None,
                model_version=self._state.version,
                store=str(self._state.store_path) if self._state.store_path else None,
                reloads=s.reloads, reload_failures=s.reload_failures, started_at=s.started)


def _store_path(path: str | Path | None, policy: TriagePolicy, create: bool) -> Path | None:
    if path is None:
        return None
    p = Path(path)
    if not p.exists():
        if not create:
            raise StoreError(f"{p}: no such verdict store (run the nightly job first, or "
                             "pass create_store=True / --create-store to start an empty one)")
        VerdictStore.open(p, policy=policy.store_policy).close()
    return p

