"""The verdict store: one SQLite file the nightly job writes and a filtering service reads.

Keyed by normalized URL. Each URL has one current verdict (the fields of ``Verdict``, with
the fetch outcome and time behind it) and a history: a new verdict never erases the record
of the old one. An analyst's label (stage ``label``) always wins: a model verdict written
over it is kept in the history only. Verdicts go stale by stage (``StorePolicy.ttl_s``), so
old page verdicts are refreshed by a later night.

Concurrency: WAL journal mode, one transaction per batch of writes. A reader (the service)
never blocks the writer (the nightly job) and sees only whole batches; a writer waits up to
``busy_timeout_s`` for another writer. The store also keeps what the next night needs to
remember: every fetch (the planner's cost history), the job's checkpoints (so a killed job
resumes), and the refine queue the service fills with URLs worth a fetch.

The file's schema version is recorded; a store of another version is refused with a clear
message (``StoreError``), never silently read.
"""

from __future__ import annotations

import csv
import json
import sqlite3
import time
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cascade.errors import StoreError
from cascade.verdict import Reason, Stage, Verdict

__all__ = ["SCHEMA_VERSION", "StoreError", "StorePolicy", "StoredVerdict", "VerdictStore"]

SCHEMA_VERSION = 1
_SUFFIX = ".sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS verdicts (
    url TEXT PRIMARY KEY,
    domain TEXT NOT NULL,
    category TEXT NOT NULL,
    confidence REAL NOT NULL,
    top TEXT NOT NULL,
    stage TEXT NOT NULL,
    needs_fetch INTEGER NOT NULL,
    reason TEXT NOT NULL,
    model_version TEXT NOT NULL,
    decided_at TEXT NOT NULL,
    decided_ts REAL NOT NULL,
    fetch_outcome TEXT,
    fetched_at TEXT,
    run_id TEXT
);
CREATE INDEX IF NOT EXISTS verdicts_domain ON verdicts(domain);
CREATE TABLE IF NOT EXISTS history (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    url TEXT NOT NULL,
    category TEXT NOT NULL,
    confidence REAL NOT NULL,
    stage TEXT NOT NULL,
    reason TEXT NOT NULL,
    model_version TEXT NOT NULL,
    decided_at TEXT NOT NULL,
    fetch_outcome TEXT,
    run_id TEXT,
    kept INTEGER NOT NULL
);
CREATE INDEX IF NOT EXISTS history_url ON history(url);
CREATE INDEX IF NOT EXISTS history_run ON history(run_id);
CREATE TABLE IF NOT EXISTS fetches (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    url TEXT NOT NULL,
    domain TEXT NOT NULL,
    outcome TEXT NOT NULL,
    status INTEGER,
    bytes_read INTEGER NOT NULL,
    elapsed_ms REAL NOT NULL,
    fetched_at TEXT NOT NULL,
    run_id TEXT
);
CREATE INDEX IF NOT EXISTS fetches_domain ON fetches(domain);
CREATE UNIQUE INDEX IF NOT EXISTS fetches_run_url ON fetches(run_id, url);
CREATE TABLE IF NOT EXISTS runs (
    run_id TEXT PRIMARY KEY,
    started_at TEXT NOT NULL,
    finished_at TEXT,
    state TEXT NOT NULL,
    params TEXT NOT NULL,
    report TEXT
);
CREATE TABLE IF NOT EXISTS run_items (
    run_id TEXT NOT NULL,
    url TEXT NOT NULL,
    count INTEGER NOT NULL,
    fetch INTEGER NOT NULL,
    rank INTEGER,
    reason TEXT NOT NULL,
    done INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (run_id, url)
);
CREATE TABLE IF NOT EXISTS refine_queue (
    url TEXT PRIMARY KEY,
    count INTEGER NOT NULL,
    first_seen TEXT NOT NULL,
    last_seen TEXT NOT NULL,
    reason TEXT NOT NULL
);
"""


@dataclass(frozen=True)
class StorePolicy:
    """How long a verdict stays fresh, by stage (seconds; None: never stale).

    URL-stage verdicts are cheap to redo and a new model may do better: a day. Page-stage
    verdicts cost a fetch: thirty days, then the page is read again (sites change).
    Analyst labels never go stale."""

    ttl_s: Mapping[str, float | None] = field(default_factory=lambda: {
        "url": 24 * 3600.0, "page": 30 * 24 * 3600.0, "label": None})
    busy_timeout_s: float = 30.0

    def is_fresh(self, stage: str, decided_ts: float, now: float | None = None) -> bool:
        ttl = self.ttl_s.get(str(stage))
        if ttl is None:
            return True
        return (time.time() if now is None else now) - decided_ts < ttl


@dataclass(frozen=True)
class StoredVerdict:
    """A verdict as the store holds it: the ``Verdict`` and what stands behind it."""

    verdict: Verdict
    domain: str
    decided_ts: float
    fetch_outcome: str | None = None
    fetched_at: str | None = None
    run_id: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {**self.verdict.to_dict(), "domain": self.domain,
                "fetch_outcome": self.fetch_outcome, "fetched_at": self.fetched_at,
                "run_id": self.run_id}


def _iso(ts: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(ts))


def _parse_iso(text: str) -> float:
    import calendar

    return float(calendar.timegm(time.strptime(text, "%Y-%m-%dT%H:%M:%SZ")))


class VerdictStore:
    """A verdict store in one SQLite file. Open with ``VerdictStore.open(path)``; use as a
    context manager or call ``close``. One instance per thread (SQLite connections are not
    shared across threads); any number of processes may open the same file."""

    def __init__(self, path: Path, conn: sqlite3.Connection, policy: StorePolicy,
                 readonly: bool) -> None:
        self.path = path
        self.policy = policy
        self.readonly = readonly
        self._conn = conn

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(cls, path: str | Path, policy: StorePolicy | None = None,
             readonly: bool = False, create: bool = True) -> VerdictStore:
        """Open (and, unless ``readonly`` or not ``create``, create) the store at ``path``."""
        path = Path(path)
        policy = policy or StorePolicy()
        if path.suffix != _SUFFIX:
            raise StoreError(f"{path}: a verdict store is one file whose name ends in "
                             f"{_SUFFIX}")
        if path.exists() and not path.is_file():
            raise StoreError(f"{path} exists and is not a file")
        if (readonly or not create) and not path.exists():
            raise StoreError(f"{path}: no such store (run the nightly job, or 'cascade "
                             "store import', to create it)")
        if not path.exists():
            path.parent.mkdir(parents=True, exist_ok=True)
        uri = f"file:{path}?mode=ro" if readonly else f"file:{path}"
        try:
            conn = sqlite3.connect(uri, uri=True, timeout=policy.busy_timeout_s,
                                   isolation_level=None, check_same_thread=False)
        except sqlite3.Error as exc:
            raise StoreError(f"{path}: cannot open: {exc}") from None
        store = cls(path, conn, policy, readonly)
        try:
            store._prepare()
        except sqlite3.DatabaseError as exc:
            conn.close()
            raise StoreError(f"{path} is not a cascade verdict store ({exc})") from None
        except BaseException:
            conn.close()
            raise
        return store

    def _prepare(self) -> None:
        c = self._conn
        c.execute(f"PRAGMA busy_timeout = {int(self.policy.busy_timeout_s * 1000)}")
        if not self.readonly:
            mode = c.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise StoreError(f"{self.path}: cannot switch to WAL journal mode ({mode})")
            c.execute("PRAGMA synchronous = NORMAL")
        tables = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if "meta" not in tables:
            if tables:
                raise StoreError(f"{self.path} is an SQLite file but not a cascade verdict "
                                 "store (no meta table)")
            if self.readonly:
                raise StoreError(f"{self.path}: empty file, not a verdict store")
            with self.batch():
                for statement in _SCHEMA.split(";"):
                    if statement.strip():
                        c.execute(statement)
                c.execute("INSERT INTO meta VALUES ('schema_version', ?), ('created_at', ?), "
                          "('kind', 'cascade-verdict-store')",
                          (str(SCHEMA_VERSION), _iso(time.time())))
            return
        row = c.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        kind = c.execute("SELECT value FROM meta WHERE key='kind'").fetchone()
        if kind is None or kind[0] != "cascade-verdict-store":
            raise StoreError(f"{self.path} is not a cascade verdict store")
        version = int(row[0]) if row else None
        if version != SCHEMA_VERSION:
            raise StoreError(
                f"{self.path} has store schema version {version}; this cascade reads version "
                f"{SCHEMA_VERSION}. Export it with the cascade release that wrote it "
                "('cascade store export') and import the file into a new store.")

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> VerdictStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ transactions
    class _Batch:
        def __init__(self, conn: sqlite3.Connection) -> None:
            self.conn = conn

        def __enter__(self) -> sqlite3.Connection:
            self.conn.execute("BEGIN IMMEDIATE")
            return self.conn

        def __exit__(self, exc_type: type[BaseException] | None, *rest: object) -> None:
            if exc_type is None:
                self.conn.execute("COMMIT")
            else:
                self.conn.execute("ROLLBACK")

    def batch(self) -> VerdictStore._Batch:
        """One write transaction: readers see all of it or none of it."""
        if self.readonly:
            raise StoreError(f"{self.path} was opened read-only")
        return VerdictStore._Batch(self._conn)

    # ------------------------------------------------------------------ verdicts
    def write_verdicts(self, verdicts: Iterable[Verdict], *, run_id: str | None = None,
                       fetches: Mapping[str, Any] | None = None,
                       domains: Mapping[str, str] | None = None) -> dict[str, int]:
        """Write verdicts in one transaction; returns counts (``written``, ``kept_label``).

        ``fetches`` maps URL to its ``FetchResult`` (outcome and time kept beside the
        verdict); ``domains`` maps URL to its registered domain (else the host is used).
        A verdict over an analyst's label goes to the history only."""
        with self.batch() as c:
            return self._write_verdicts_in(c, verdicts, run_id=run_id, fetches=fetches,
                                           domains=domains)

    def _write_verdicts_in(self, c: sqlite3.Connection, verdicts: Iterable[Verdict], *,
                           run_id: str | None = None, fetches: Mapping[str, Any] | None = None,
                           domains: Mapping[str, str] | None = None) -> dict[str, int]:
        """``write_verdicts`` inside a transaction the caller holds."""
        written = kept = 0
        for v in verdicts:
            now_ts = _parse_iso(v.decided_at) if v.decided_at else time.time()
            result = fetches.get(v.url) if fetches else None
            outcome = str(result.outcome) if result is not None else None
            fetched_at = v.decided_at if result is not None else None
            domain = (domains or {}).get(v.url) or _host(v.url)
            current = c.execute("SELECT stage FROM verdicts WHERE url = ?",
                                (v.url,)).fetchone()
            label_wins = current is not None and current[0] == Stage.LABEL and \
                v.stage != Stage.LABEL
            c.execute("INSERT INTO history (url, category, confidence, stage, reason, "
                      "model_version, decided_at, fetch_outcome, run_id, kept) VALUES "
                      "(?,?,?,?,?,?,?,?,?,?)",
                      (v.url, v.category, float(v.confidence), str(v.stage),
                       str(v.reason), v.model_version, v.decided_at, outcome, run_id,
                       0 if label_wins else 1))
            if label_wins:
                kept += 1
                continue
            c.execute(
                "INSERT INTO verdicts (url, domain, category, confidence, top, stage, "
                "needs_fetch, reason, model_version, decided_at, decided_ts, "
                "fetch_outcome, fetched_at, run_id) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?) "
                "ON CONFLICT(url) DO UPDATE SET domain=excluded.domain, "
                "category=excluded.category, confidence=excluded.confidence, "
                "top=excluded.top, stage=excluded.stage, needs_fetch=excluded.needs_fetch, "
                "reason=excluded.reason, model_version=excluded.model_version, "
                "decided_at=excluded.decided_at, decided_ts=excluded.decided_ts, "
                "fetch_outcome=excluded.fetch_outcome, fetched_at=excluded.fetched_at, "
                "run_id=excluded.run_id",
                (v.url, domain, v.category, float(v.confidence),
                 json.dumps([[cat, round(p, 6)] for cat, p in v.top]), str(v.stage),
                 int(v.needs_fetch), str(v.reason), v.model_version, v.decided_at,
                 now_ts, outcome, fetched_at, run_id))
            if v.stage != Stage.URL:  # refined (or labelled): no longer queued
                c.execute("DELETE FROM refine_queue WHERE url = ?", (v.url,))
            written += 1
        return {"written": written, "kept_label": kept}

    def label(self, url: str, category: str, *, analyst: str = "analyst",
              domain: str | None = None) -> None:
        """Record an analyst's label: it wins over every model verdict from now on."""
        v = Verdict(url=url, category=category, confidence=1.0, top=((category, 1.0),),
                    stage=Stage.LABEL, needs_fetch=False, reason=Reason.ANALYST,
                    model_version=f"label:{analyst}")
        self.write_verdicts([v], domains={url: domain} if domain else None)

    def _row_to_stored(self, row: sqlite3.Row | tuple) -> StoredVerdict:
        (url, domain, category, confidence, top, stage, needs, reason, model_version,
         decided_at, decided_ts, outcome, fetched_at, run_id) = row
        verdict = Verdict(url=url, category=category, confidence=float(confidence),
                          top=tuple((str(c), float(p)) for c, p in json.loads(top)),
                          stage=stage, needs_fetch=bool(needs), reason=reason,
                          model_version=model_version, decided_at=decided_at)
        return StoredVerdict(verdict, domain, float(decided_ts), outcome, fetched_at, run_id)

    _COLUMNS = ("url, domain, category, confidence, top, stage, needs_fetch, reason, "
                "model_version, decided_at, decided_ts, fetch_outcome, fetched_at, run_id")

    def get(self, url: str) -> StoredVerdict | None:
        """The current verdict of a normalized URL, or None."""
        row = self._conn.execute(f"SELECT {self._COLUMNS} FROM verdicts WHERE url = ?",
                                 (url,)).fetchone()
        return None if row is None else self._row_to_stored(row)

    def get_many(self, urls: Sequence[str]) -> dict[str, StoredVerdict]:
        """Current verdicts of many URLs (missing ones left out), in one read transaction."""
        out: dict[str, StoredVerdict] = {}
        for start in range(0, len(urls), 500):
            part = list(urls[start:start + 500])
            marks = ",".join("?" * len(part))
            for row in self._conn.execute(
                    f"SELECT {self._COLUMNS} FROM verdicts WHERE url IN ({marks})", part):
                stored = self._row_to_stored(row)
                out[stored.verdict.url] = stored
        return out

    def domain_verdict(self, domain: str) -> StoredVerdict | None:
        """A verdict for the registered domain: its own root URL's, else the most common
        page-or-label category among its URLs (None when the store knows nothing of it)."""
        for root in _roots(domain):
            stored = self.get(root)
            if stored is not None and stored.verdict.stage != Stage.URL:
                return stored
        row = self._conn.execute(
            f"SELECT {self._COLUMNS} FROM verdicts WHERE domain = ? AND stage != 'url' "
            "ORDER BY confidence DESC LIMIT 1", (domain,)).fetchone()
        return None if row is None else self._row_to_stored(row)

    def known(self, url: str, domain: str | None = None
              ) -> tuple[StoredVerdict, bool] | None:
        """The refined verdict (page or label stage) for ``url``, or, with ``domain``, the
        registered domain's (as ``domain_verdict``: its root URL's first, then its most
        confident); with True when it is the URL's own. One indexed query: the service's
        request path."""
        if domain is None:
            row = self._conn.execute(
                f"SELECT {self._COLUMNS}, 1 FROM verdicts WHERE url = ? AND stage != 'url'",
                (url,)).fetchone()
        else:
            row = self._conn.execute(
                f"SELECT {self._COLUMNS}, url = ?1 AS exact FROM verdicts "
                "WHERE stage != 'url' AND (url = ?1 OR domain = ?2) "
                "ORDER BY exact DESC, url IN (?3, ?4, ?5, ?6) DESC, confidence DESC LIMIT 1",
                (url, domain, *_roots(domain))).fetchone()
        if row is None:
            return None
        return self._row_to_stored(row[:-1]), bool(row[-1])

    def known_many(self, urls: Sequence[str], domains: Sequence[str] | None = None
                   ) -> dict[str, tuple[StoredVerdict, bool]]:
        """``known`` for many URLs (``domains`` aligned with ``urls``), in batched reads."""
        out: dict[str, tuple[StoredVerdict, bool]] = {}
        for start in range(0, len(urls), 500):
            part = list(urls[start:start + 500])
            marks = ",".join("?" * len(part))
            for row in self._conn.execute(f"SELECT {self._COLUMNS} FROM verdicts WHERE "
                                          f"url IN ({marks}) AND stage != 'url'", part):
                stored = self._row_to_stored(row)
                out[stored.verdict.url] = (stored, True)
        if domains is not None:
            by_domain: dict[str, tuple[StoredVerdict, bool] | None] = {}
            for url, domain in zip(urls, domains, strict=True):
                if url in out or not domain:
                    continue
                if domain not in by_domain:
                    row = self._conn.execute(
                        f"SELECT {self._COLUMNS} FROM verdicts WHERE stage != 'url' AND "
                        "domain = ?1 ORDER BY url IN (?2, ?3, ?4, ?5) DESC, confidence DESC "
                        "LIMIT 1", (domain, *_roots(domain))).fetchone()
                    by_domain[domain] = None if row is None else \
                        (self._row_to_stored(row), False)
                if by_domain[domain] is not None:
                    out[url] = by_domain[domain]  # type: ignore[assignment]
        return out

    def change_mark(self) -> int:
        """A number that changes whenever a verdict is written (the history only grows):
        how a reader knows its cached answers may be out of date."""
        row = self._conn.execute("SELECT MAX(id) FROM history").fetchone()
        return int(row[0] or 0)

    def fresh(self, urls: Sequence[str], now: float | None = None) -> set[str]:
        """The URLs whose current verdict is still fresh under the policy's TTLs."""
        now = time.time() if now is None else now
        return {url for url, s in self.get_many(urls).items()
                if self.policy.is_fresh(str(s.verdict.stage), s.decided_ts, now)}

    def history(self, url: str) -> list[dict[str, Any]]:
        """Every verdict ever written for ``url``, oldest first (``kept`` 0: a label won)."""
        cols = ("category", "confidence", "stage", "reason", "model_version", "decided_at",
                "fetch_outcome", "run_id", "kept")
        rows = self._conn.execute(f"SELECT {', '.join(cols)} FROM history WHERE url = ? "
                                  "ORDER BY id", (url,))
        return [dict(zip(cols, r, strict=True)) for r in rows]

    def iter_verdicts(self, stage: str | None = None) -> Iterator[StoredVerdict]:
        """Every current verdict (of one stage), in URL order."""
        where, args = ("WHERE stage = ?", (stage,)) if stage else ("", ())
        for row in self._conn.execute(
                f"SELECT {self._COLUMNS} FROM verdicts {where} ORDER BY url", args):
            yield self._row_to_stored(row)

    def counts(self) -> dict[str, int]:
        """Current verdicts by stage, history rows, fetches, queued URLs."""
        out = {f"stage_{s}": n for s, n in
               self._conn.execute("SELECT stage, COUNT(*) FROM verdicts GROUP BY stage")}
        for table in ("verdicts", "history", "fetches", "refine_queue"):
            out[table] = self._conn.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
        return out

    # ------------------------------------------------------------------ fetch history
    def record_fetches(self, results: Iterable[Any], *, run_id: str | None = None,
                       domains: Mapping[str, str] | None = None,
                       urls: Mapping[str, str] | None = None) -> int:
        """Keep fetch results as cost history (one row per run and URL; a repeat is
        ignored, so a resumed run never records a fetch twice). ``urls`` maps a result's
        URL to the store's key where they differ."""
        with self.batch() as c:
            return self._record_fetches_in(c, results, run_id=run_id, domains=domains,
                                           urls=urls)

    def _record_fetches_in(self, c: sqlite3.Connection, results: Iterable[Any], *,
                           run_id: str | None = None, domains: Mapping[str, str] | None = None,
                           urls: Mapping[str, str] | None = None) -> int:
        """``record_fetches`` inside a transaction the caller holds."""
        n = 0
        for r in results:
            url = (urls or {}).get(r.url, r.url)
            cur = c.execute(
                "INSERT OR IGNORE INTO fetches (url, domain, outcome, status, bytes_read, "
                "elapsed_ms, fetched_at, run_id) VALUES (?,?,?,?,?,?,?,?)",
                (url, (domains or {}).get(url) or _host(url), str(r.outcome), r.status,
                 int(r.bytes_read), float(r.elapsed_ms), _iso(time.time()), run_id))
            n += cur.rowcount
        return n

    def fetch_history(self, since_ts: float | None = None) -> list[dict[str, Any]]:
        """Rows for ``FetchCosts.from_history``: domain, ok, bytes, ms."""
        args: tuple = ()
        where = ""
        if since_ts is not None:
            where, args = "WHERE fetched_at >= ?", (_iso(since_ts),)
        return [{"domain": d, "ok": o == "ok", "bytes": b, "ms": ms} for d, o, b, ms in
                self._conn.execute(f"SELECT domain, outcome, bytes_read, elapsed_ms FROM "
                                   f"fetches {where}", args)]

    def domain_categories(self) -> tuple[list[str], list[str]]:
        """(domain, category) of every page-stage or labelled verdict: what the planner's
        domain history is built from."""
        rows = self._conn.execute("SELECT domain, category FROM verdicts WHERE stage != 'url'")
        domains, cats = [], []
        for d, c in rows:
            domains.append(d)
            cats.append(c)
        return domains, cats

    # ------------------------------------------------------------------ refine queue
    def enqueue_refine(self, items: Iterable[tuple[str, int, str]]) -> int:
        """Add (url, lookups, reason) to the refine queue the nightly job reads; counts of
        a URL already queued are added up."""
        now = _iso(time.time())
        n = 0
        with self.batch() as c:
            for url, count, reason in items:
                c.execute("INSERT INTO refine_queue VALUES (?,?,?,?,?) ON CONFLICT(url) DO "
                          "UPDATE SET count = count + excluded.count, last_seen = "
                          "excluded.last_seen", (url, int(count), now, now, str(reason)))
                n += 1
        return n

    def refine_queue(self, limit: int | None = None) -> list[tuple[str, int]]:
        """Queued (url, lookups), most looked up first."""
        sql = "SELECT url, count FROM refine_queue ORDER BY count DESC, url"
        if limit is not None:
            sql += f" LIMIT {int(limit)}"
        return [(u, int(c)) for u, c in self._conn.execute(sql)]

    def dequeue_refine(self, urls: Iterable[str]) -> int:
        """Take URLs off the refine queue (the nightly job, once it decided them)."""
        n = 0
        with self.batch() as c:
            for url in urls:
                n += c.execute("DELETE FROM refine_queue WHERE url = ?", (url,)).rowcount
        return n

    def queue_length(self) -> int:
        return int(self._conn.execute("SELECT COUNT(*) FROM refine_queue").fetchone()[0])

    # ------------------------------------------------------------------ runs (checkpoints)
    def run(self, run_id: str) -> dict[str, Any] | None:
        row = self._conn.execute("SELECT run_id, started_at, finished_at, state, params, "
                                 "report FROM runs WHERE run_id = ?", (run_id,)).fetchone()
        if row is None:
            return None
        return {"run_id": row[0], "started_at": row[1], "finished_at": row[2],
                "state": row[3], "params": json.loads(row[4]),
                "report": json.loads(row[5]) if row[5] else None}

    def start_run(self, run_id: str, params: Mapping[str, Any]) -> None:
        with self.batch() as c:
            c.execute("INSERT OR IGNORE INTO runs VALUES (?,?,NULL,'started',?,NULL)",
                      (run_id, _iso(time.time()), json.dumps(params, sort_keys=True)))

    def set_run_state(self, run_id: str, state: str, report: Mapping[str, Any] | None = None
                      ) -> None:
        with self.batch() as c:
            c.execute("UPDATE runs SET state = ?, report = COALESCE(?, report), finished_at = "
                      "CASE WHEN ? = 'done' THEN ? ELSE finished_at END WHERE run_id = ?",
                      (state, json.dumps(report) if report is not None else None, state,
                       _iso(time.time()), run_id))

    def previous_run(self, before: str) -> dict[str, Any] | None:
        """The last finished run other than ``before`` (for the drift section)."""
        row = self._conn.execute("SELECT run_id FROM runs WHERE state = 'done' AND run_id != ? "
                                 "ORDER BY started_at DESC, rowid DESC LIMIT 1",
                                 (before,)).fetchone()
        return None if row is None else self.run(row[0])

    def save_plan(self, run_id: str, items: Iterable[tuple[str, int, bool, int | None, str]]
                  ) -> None:
        """The run's plan (url, lookups, fetch?, rank, reason), written once."""
        with self.batch() as c:
            c.executemany("INSERT OR IGNORE INTO run_items (run_id, url, count, fetch, rank, "
                          "reason) VALUES (?,?,?,?,?,?)",
                          ((run_id, u, int(n), int(f), r, str(why)) for u, n, f, r, why in
                           items))

    def plan_items(self, run_id: str) -> list[dict[str, Any]]:
        cols = ("url", "count", "fetch", "rank", "reason", "done")
        return [dict(zip(cols, r, strict=True)) for r in self._conn.execute(
            "SELECT url, count, fetch, rank, reason, done FROM run_items WHERE run_id = ? "
            "ORDER BY (rank IS NULL), rank, url", (run_id,))]

    def mark_done(self, run_id: str, urls: Iterable[str],
                  conn: sqlite3.Connection | None = None) -> None:
        c = conn or self._conn
        c.executemany("UPDATE run_items SET done = 1 WHERE run_id = ? AND url = ?",
                      ((run_id, u) for u in urls))

    def run_history(self, run_id: str) -> dict[str, dict[str, Any]]:
        """URL -> the verdict a run wrote (from the history), for drift between nights."""
        out = {}
        for url, cat, conf in self._conn.execute(
                "SELECT url, category, confidence FROM history WHERE run_id = ? ORDER BY id",
                (run_id,)):
            out[url] = {"category": cat, "confidence": float(conf)}
        return out

    # ------------------------------------------------------------------ import / export
    def export(self, target: str | Path, fmt: str | None = None,
               stage: str | None = None) -> int:
        """Current verdicts to JSON Lines or CSV (by ``fmt`` or the file's suffix)."""
        from cascade.io import open_writer

        n = 0
        as_csv = fmt == "csv" or (fmt is None and str(target).endswith((".csv", ".csv.gz")))
        with open_writer(target, fmt=fmt) as out:
            for stored in self.iter_verdicts(stage):
                row = stored.to_dict()
                if as_csv:
                    row["top"] = json.dumps(row["top"])
                out.write(row)
                n += 1
        return n

    def import_verdicts(self, source: str | Path, batch_size: int = 5000) -> dict[str, int]:
        """Verdicts from a JSON Lines or CSV export (rows with url, category, confidence,
        stage, ...); a bad row is counted and skipped."""
        from cascade.io import ReadStats, read_records

        stats = ReadStats()
        buffer: list[Verdict] = []
        written = 0
        for rec in read_records(source, stats=stats):
            e = rec.extra
            try:
                top_raw = e.get("top") or "[]"
                top = tuple((str(c), float(p)) for c, p in json.loads(top_raw))
                category = e["category"]
                v = Verdict(url=rec.url, category=category,
                            confidence=float(e.get("confidence", 1.0)),
                            top=top or ((category, float(e.get("confidence", 1.0))),),
                            stage=e.get("stage", "label"),
                            needs_fetch=str(e.get("needs_fetch", "false")).lower() == "true",
                            reason=e.get("reason", "imported"),
                            model_version=e.get("model_version", "imported"),
                            decided_at=e.get("decided_at") or _iso(time.time()))
            except (KeyError, ValueError, TypeError) as exc:
                stats.add_bad(rec.line_no, rec.url, f"not a verdict row: {exc}")
                continue
            buffer.append(v)
            if len(buffer) >= batch_size:
                written += self.write_verdicts(buffer)["written"]
                buffer = []
        if buffer:
            written += self.write_verdicts(buffer)["written"]
        return {"written": written, "bad": stats.bad}

    def export_training(self, target: str | Path, min_page_confidence: float | None = None
                        ) -> int:
        """A labelled file ``cascade train`` reads (``url,label``): every analyst label, and,
        with ``min_page_confidence``, page-stage verdicts at least that confident."""
        target = Path(target)
        target.parent.mkdir(parents=True, exist_ok=True)
        n = 0
        with target.open("w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow(["url", "label", "source"])
            for stored in self.iter_verdicts():
                v = stored.verdict
                if v.stage == Stage.LABEL:
                    writer.writerow([v.url, v.category, "analyst"])
                    n += 1
                elif (min_page_confidence is not None and v.stage == Stage.PAGE
                      and v.confidence >= min_page_confidence):
                    writer.writerow([v.url, v.category, "page-verdict"])
                    n += 1
        return n


def _roots(domain: str) -> tuple[str, str, str, str]:
    """The root URLs that speak for a registered domain, most telling first."""
    return (f"http://{domain}/", f"https://{domain}/", f"http://www.{domain}/",
            f"https://www.{domain}/")


def _host(url: str) -> str:
    from urllib.parse import urlsplit

    return urlsplit(url).hostname or ""
