"""``cascade train`` with saved pages, ``cascade refine`` against the loopback site farm, and
``cascade explain --page``."""

from __future__ import annotations

import json

import pytest

from cascade.cli import EXIT_OK, main
from cascade.scenario.site_farm import SiteFarm
from cascade.urls import normalize


@pytest.fixture(scope="module")
def trained(cli_pages_dir, scenario):
    """The session's folder trained by ``cascade train --pages`` (``train.csv``, ``saved/``,
    ``model/``) and the records of ``train.csv``. Read-only: tests write under ``tmp_path``."""
    return cli_pages_dir, scenario.records[:600]


def test_train_with_pages_writes_page_model_and_fusion(trained) -> None:
    root, _ = trained
    assert (root / "model" / "page" / "model.json").is_file()
    assert (root / "model" / "fusion" / "model.json").is_file()


def test_refine_fuses_fetched_pages_and_keeps_url_verdict_on_refusal(trained, capsys) -> None:
    root, records = trained
    with SiteFarm(records) as farm:
        host = normalize(records[1].url).host
        path = normalize(records[1].url).path
        good = farm.url(host, path)
        refused = farm.url("inside.test", "/")
        code = main(["--quiet", "refine", "-m", str(root / "model"),
                     "--resolve", f"{host}:127.0.0.1", "--resolve", "inside.test:10.1.2.3",
                     "--allow-network", "127.0.0.1/32", "--port", str(farm.port),
                     "--deadline", "3", "--ignore-robots", good, refused])
    assert code == EXIT_OK
    rows = {r["url"]: r for r in map(json.loads, capsys.readouterr().out.splitlines())}
    assert rows[normalize(good).url]["stage"] == "page"
    assert rows[normalize(good).url]["fetch"]["outcome"] == "ok"
    # 10.0.0.0/8 is private use (RFC 1918): never fetched, the URL verdict stays
    assert rows[normalize(refused).url]["stage"] == "url"
    assert rows[normalize(refused).url]["reason"] == "fetch:blocked-address"


def test_explain_with_page_shows_page_words(trained, capsys) -> None:
    root, records = trained
    page = root / "saved" / "p1.html"
    code = main(["explain", "-m", str(root / "model"), "--page", str(page), records[1].url])
    assert code == EXIT_OK
    out = capsys.readouterr().out
    assert "page model:" in out and "URL model:" in out
    assert "body:" in out or "title:" in out


def test_train_with_pages_writes_a_fetch_value_model(trained) -> None:
    root, _ = trained
    assert (root / "model" / "fetch-value" / "model.json").is_file()


def test_plan_writes_the_fetch_list_within_budget(trained, capsys) -> None:
    root, records = trained
    urls = [r.url for r in records[:50]]
    code = main(["plan", "-m", str(root / "model"), "--budget", "10%", "--all", *urls])
    assert code == EXIT_OK
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    chosen = [r for r in rows if r["fetch"]]
    summary = json.loads(captured.err.strip().splitlines()[-1])
    limit = summary["urls"] // 10  # 10% of the usable URLs, rounded down
    assert summary["urls"] == len(rows) and len(rows) >= 45
    worth = summary["urls"] - summary["left_out"].get("no-gain", 0)
    assert len(chosen) == summary["fetches"] == min(limit, worth)
    assert [r["rank"] for r in chosen] == list(range(1, len(chosen) + 1))
    assert all(r["reason"] in ("budget:count", "no-gain") for r in rows if not r["fetch"])
    assert chosen[0]["expected_gain"] >= chosen[-1]["expected_gain"]


def test_report_writes_html_and_json(trained, tmp_path) -> None:
    root, _ = trained
    code = main(["--quiet", "report", "-m", str(root / "model"), "-i", str(root / "train.csv"),
                 "--pages", str(root / "saved"), "--out", str(tmp_path / "rep"), "--seeds", "2"])
    assert code == EXIT_OK
    rep = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert rep["context"]["planner"] == "fetch-value model"
    assert rep["context"]["rows with a page"] == 480
    assert (tmp_path / "rep" / "report.html").stat().st_size > 10_000


def test_plan_merges_repeated_urls_and_sums_their_lookups(trained, tmp_path, capsys) -> None:
    root, records = trained
    url = records[3].url
    (tmp_path / "day.csv").write_text(f"url,count\n{url},2\n{url},5\nnot a url,1\n")
    code = main(["plan", "-m", str(root / "model"), "--budget", "100%", "--all",
                 "-i", str(tmp_path / "day.csv")])
    assert code == 3  # done, one bad line skipped and reported
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert len(rows) == 1
    assert json.loads(captured.err.strip().splitlines()[-1])["urls"] == 1


def test_plan_learns_from_fetch_history_and_skips_its_bad_lines(trained, tmp_path,
                                                                 capsys) -> None:
    root, records = trained
    host = normalize(records[0].url).host
    good = {"url": f"http://{host}/a", "outcome": "timeout", "bytes_read": 0,
            "elapsed_ms": 10000}
    bad = {"url": f"http://{host}/b", "outcome": "ok", "bytes_read": -5, "elapsed_ms": 1}
    history = tmp_path / "fetches.jsonl"
    history.write_text(json.dumps(good) + "\n" + json.dumps(bad) + "\n")
    code = main(["plan", "-m", str(root / "model"), "--budget", "5", "--fetch-history",
                 str(history), records[0].url, records[1].url])
    assert code == EXIT_OK
    summary = json.loads(capsys.readouterr().err.strip().splitlines()[-1])
    assert summary["fetch_history"]["bad"] == 1
    # A file that is not fetch output at all is refused, not read as free fetches.
    code = main(["plan", "-m", str(root / "model"), "--budget", "5", "--fetch-history",
                 str(root / "train.csv"), records[0].url])
    assert code == 4
    assert "no usable fetch results" in capsys.readouterr().err
