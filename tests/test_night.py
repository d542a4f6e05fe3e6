"""The verdict store and the nightly job, on a real SQLite file and the loopback site farm;
the crash test kills a real child process (SIGKILL) mid-night and starts it again."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from cascade.batch import NightOptions, run_night
from cascade.budget import Budget
from cascade.bundle import ModelBundle
from cascade.errors import StoreError
from cascade.scenario.site_farm import SiteFarm
from cascade.store import SCHEMA_VERSION, VerdictStore
from cascade.urls import normalize
from cascade.verdict import Verdict

HERE = Path(__file__).parent
sys.path.insert(0, str(HERE))
import night_helpers as nh  # noqa: E402


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("night")
    records = nh.scenario()
    nh.train_small_bundle(records, root / "model")
    nh.write_log(records, root / "log.csv")
    hosts = sorted({normalize(r.url).host for r in records})
    (root / "hosts.txt").write_text("\n".join(hosts))
    return root, records, hosts


def _verdict(url: str, category: str = "news", stage: str = "url") -> Verdict:
    return Verdict(url=url, category=category, confidence=0.6,
                   top=((category, 0.6), ("shopping", 0.3)), stage=stage,
                   needs_fetch=stage == "url", reason="under-threshold", model_version="m")


# --------------------------------------------------------------------------- the store
def test_store_keeps_history_and_labels_win(tmp_path: Path) -> None:
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        store.write_verdicts([_verdict("http://a.example/")])
        store.label("http://a.example/", "shopping")
        store.write_verdicts([_verdict("http://a.example/", "news", "page")])
        current = store.get("http://a.example/")
        assert current.verdict.category == "shopping" and current.verdict.stage == "label"
        history = store.history("http://a.example/")
        assert [h["category"] for h in history] == ["news", "shopping", "news"]
        assert history[-1]["kept"] == 0  # the page verdict did not replace the label


def test_store_is_wal_and_records_its_schema_version(tmp_path: Path) -> None:
    VerdictStore.open(tmp_path / "v.sqlite").close()
    conn = sqlite3.connect(tmp_path / "v.sqlite")
    # SQLite documentation, "Write-Ahead Logging": the mode persists in the file
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] \
        == str(SCHEMA_VERSION)


def test_store_of_another_version_is_refused(tmp_path: Path) -> None:
    VerdictStore.open(tmp_path / "v.sqlite").close()
    conn = sqlite3.connect(tmp_path / "v.sqlite")
    conn.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match="schema version 99"):
        VerdictStore.open(tmp_path / "v.sqlite")


def test_store_refuses_foreign_files_and_names(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match=".sqlite"):
        VerdictStore.open(tmp_path / "v.db")
    (tmp_path / "x.sqlite").write_bytes(b"not a database at all" * 100)
    with pytest.raises(StoreError):
        VerdictStore.open(tmp_path / "x.sqlite")
    other = sqlite3.connect(tmp_path / "other.sqlite")
    other.execute("CREATE TABLE t (x)")
    other.commit()
    other.close()
    with pytest.raises(StoreError, match="not a cascade verdict store"):
        VerdictStore.open(tmp_path / "other.sqlite")


def test_stale_page_verdicts_are_not_fresh(tmp_path: Path) -> None:
    from cascade.store import StorePolicy

    policy = StorePolicy(ttl_s={"url": 10.0, "page": 100.0, "label": None})
    with VerdictStore.open(tmp_path / "v.sqlite", policy=policy) as store:
        store.write_verdicts([_verdict("http://a.example/", stage="page")])
        stored = store.get("http://a.example/")
        assert policy.is_fresh("page", stored.decided_ts, now=stored.decided_ts + 50)
        assert not policy.is_fresh("page", stored.decided_ts, now=stored.decided_ts + 150)
        assert policy.is_fresh("label", 0.0)


def test_store_export_import_and_training_file(tmp_path: Path) -> None:
    with VerdictStore.open(tmp_path / "a.sqlite") as a:
        a.write_verdicts([_verdict("http://a.example/", stage="page"),
                          _verdict("http://b.example/")])
        a.label("http://c.example/", "betting")
        assert a.export(tmp_path / "out.jsonl") == 3
        assert a.export(tmp_path / "out.csv") == 3
        assert a.export_training(tmp_path / "train.csv") == 1
        assert a.export_training(tmp_path / "train2.csv", min_page_confidence=0.5) == 2
    with VerdictStore.open(tmp_path / "b.sqlite") as b:
        assert b.import_verdicts(tmp_path / "out.csv")["written"] == 3
        assert b.get("http://c.example/").verdict.stage == "label"
    rows = (tmp_path / "train.csv").read_text().splitlines()
    assert rows[0].startswith("url,label") and "betting" in rows[1]


def test_a_reader_never_blocks_the_writer_and_sees_whole_batches(tmp_path: Path) -> None:
    path = tmp_path / "v.sqlite"
    VerdictStore.open(path).close()
    errors: list[BaseException] = []
    seen: list[int] = []
    stop = threading.Event()

    def read() -> None:
        with VerdictStore.open(path, readonly=True) as reader:
            while not stop.is_set():
                try:
                    seen.append(reader.counts()["verdicts"])
                except BaseException as exc:  # noqa: BLE001 - collected for the assert
                    errors.append(exc)
                    return

    thread = threading.Thread(target=read)
    thread.start()
    with VerdictStore.open(path) as writer:
        for b in range(30):  # batches of 10: a reader must see a multiple of 10
            writer.write_verdicts([_verdict(f"http://h{b}-{i}.example/") for i in range(10)])
    stop.set()
    thread.join(10)
    assert not errors
    assert seen and all(n % 10 == 0 for n in seen)


# --------------------------------------------------------------------------- the night
def _night(world, store_path: Path, out: Path, **kw):
    root, records, hosts = world
    with SiteFarm(records) as farm, VerdictStore.open(store_path) as store:
        return run_night(ModelBundle.load(root / "model"), store, root / "log.csv", out,
                         options=NightOptions(budget=Budget(max_fraction=0.5), progress=False,
                                              **kw),
                         fetcher_factory=nh.farm_fetcher_factory(farm.port, hosts),
                         fetch_target=nh.farm_target(farm.port))


def test_a_night_writes_verdicts_review_queue_and_report(world, tmp_path: Path) -> None:
    result = _night(world, tmp_path / "v.sqlite", tmp_path / "out")
    rep = result.report
    assert rep["decided"] > 0 and rep["spent"]["fetches"] <= rep["decided"] // 2
    assert rep["coverage_after"]["share"] >= rep["coverage_before"]["share"]
    assert set(result.paths) == {"changes", "review", "report", "summary"}
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        counts = store.counts()
        assert counts["verdicts"] == rep["decided"]
        assert counts.get("stage_page", 0) > 0
        assert counts["fetches"] == rep["spent"]["fetches"]
    review = [json.loads(x) for x in result.paths["review"].read_text().splitlines()]
    assert all("because" in r and r["lookups"] >= 1 for r in review)


def test_the_second_night_skips_fresh_verdicts_and_reports_drift(world, tmp_path: Path) -> None:
    first = _night(world, tmp_path / "v.sqlite", tmp_path / "n1")
    root = world[0]
    (root / "log2.csv").write_text((root / "log.csv").read_text() + "\n")  # another run id
    with SiteFarm(world[1]) as farm, VerdictStore.open(tmp_path / "v.sqlite") as store:
        second = run_night(ModelBundle.load(root / "model"), store, root / "log2.csv",
                           tmp_path / "n2",
                           options=NightOptions(budget=Budget(max_fraction=0.5),
                                                progress=False),
                           fetcher_factory=nh.farm_fetcher_factory(farm.port, world[2]),
                           fetch_target=nh.farm_target(farm.port))
    assert second.run_id != first.run_id
    assert second.report["fresh_skipped"] == first.report["decided"]
    assert second.report["drift"]["previous_run"] == first.run_id


def test_bad_lines_are_counted_and_the_night_goes_on(world, tmp_path: Path) -> None:
    root = world[0]
    log = tmp_path / "bad.txt"
    good = [line.split(",")[0] for line in (root / "log.csv").read_text().splitlines()[1:40]]
    # a line that is not a URL, invalid UTF-8, a 1 MB line, then more good lines
    log.write_bytes(("\n".join(good[:20]) + "\nnot a url at all\n").encode()
                    + b"\xff\xfe\x00bad\n" + b"http://" + b"a" * 1_100_000 + b".example/\n"
                    + "\n".join(good[20:]).encode())
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        result = run_night(ModelBundle.load(root / "model"), store, log, tmp_path / "out",
                           options=NightOptions(budget=Budget(max_fetches=0), progress=False))
    assert result.report["input"]["bad"] >= 2
    assert result.report["decided"] == len(set(good))


def test_a_missing_log_is_a_clear_error_before_any_work(world, tmp_path: Path) -> None:
    from cascade.errors import InputFormatError

    with VerdictStore.open(tmp_path / "v.sqlite") as store, \
            pytest.raises(InputFormatError, match="no such log"):
        run_night(ModelBundle.load(world[0] / "model"), store, tmp_path / "none.csv",
                  tmp_path / "out")
    with VerdictStore.open(tmp_path / "v.sqlite") as store:
        assert store.counts()["verdicts"] == 0


def _snapshot(path: Path) -> tuple[dict, list, int]:
    conn = sqlite3.connect(path)
    verdicts = {u: (c, s) for u, c, s in conn.execute(
        "SELECT url, category, stage FROM verdicts")}
    fetched = sorted(u for (u,) in conn.execute("SELECT url FROM fetches"))
    history = conn.execute("SELECT COUNT(*) FROM history").fetchone()[0]
    conn.close()
    return verdicts, fetched, history


@pytest.mark.parametrize("kill_after_fetches", [3, 20])
def test_killed_night_resumes_without_loss_or_duplicates(world, tmp_path: Path,
                                                         kill_after_fetches: int) -> None:
    """SIGKILL a real child process once the store holds ``kill_after_fetches`` fetches,
    run the same command again, and compare with an uninterrupted night."""
    root, records, _hosts = world
    with SiteFarm(records) as farm:
        def command(store: Path, out: Path) -> list[str]:
            return [sys.executable, str(HERE / "night_helpers.py"), str(root / "model"),
                    str(store), str(root / "log.csv"), str(out), str(farm.port),
                    str(root / "hosts.txt")]

        env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE.parent), str(HERE)])}
        clean = subprocess.run(command(tmp_path / "clean.sqlite", tmp_path / "c"), env=env,
                               capture_output=True, timeout=300)
        assert clean.returncode == 0, clean.stderr.decode()[-2000:]
        crashed = tmp_path / "crashed.sqlite"
        proc = subprocess.Popen(command(crashed, tmp_path / "k"), env=env,
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + 240
        killed = False
        while time.monotonic() < deadline and proc.poll() is None:
            if crashed.exists():
                try:
                    conn = sqlite3.connect(f"file:{crashed}?mode=ro", uri=True, timeout=1)
                    n = conn.execute("SELECT COUNT(*) FROM fetches").fetchone()[0]
                    conn.close()
                except sqlite3.Error:
                    n = 0
                if n >= kill_after_fetches:
                    proc.send_signal(signal.SIGKILL)
                    killed = True
                    break
            time.sleep(0.05)  # a bounded poll of the child's progress, not a wait for it
        proc.wait(30)
        assert killed, "the night ended before the kill point"
        again = subprocess.run(command(crashed, tmp_path / "k"), env=env, capture_output=True,
                               timeout=300)
        assert again.returncode == 0, again.stderr.decode()[-2000:]
    v_clean, f_clean, _ = _snapshot(tmp_path / "clean.sqlite")
    v_crash, f_crash, _ = _snapshot(crashed)
    assert v_crash == v_clean  # no verdict lost, none different
    assert f_crash == f_clean  # every planned page fetched exactly once, none twice
    assert len(f_crash) == len(set(f_crash))


def test_the_dask_engine_gives_the_same_night_on_a_local_cluster(world, tmp_path: Path) -> None:
    """A real LocalCluster of 2 worker processes: the same verdicts as the local engine."""
    distributed = pytest.importorskip("distributed")
    root, records, hosts = world
    local = _night(world, tmp_path / "local.sqlite", tmp_path / "l")
    with SiteFarm(records) as farm, VerdictStore.open(tmp_path / "dask.sqlite") as store, \
            distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                     dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        remote = run_night(ModelBundle.load(root / "model"), store, root / "log.csv",
                           tmp_path / "d",
                           options=NightOptions(budget=Budget(max_fraction=0.5),
                                                progress=False),
                           fetcher_factory=nh.farm_fetcher_factory(farm.port, hosts),
                           fetch_target=nh.farm_target(farm.port), engine="dask",
                           dask_client=client)
    assert remote.report["spent"]["fetches"] == local.report["spent"]["fetches"]
    v_local, f_local, _ = _snapshot(tmp_path / "local.sqlite")
    v_dask, f_dask, _ = _snapshot(tmp_path / "dask.sqlite")
    assert v_dask == v_local and f_dask == f_local
