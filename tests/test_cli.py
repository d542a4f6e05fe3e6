"""The ``cascade`` command end to end on small invented data, in-process and as a real
process (exit codes, bad lines counted, never a traceback for a user's mistake)."""

from __future__ import annotations

import gzip
import json
import subprocess
import sys
from pathlib import Path

import pytest

from cascade.cli import EXIT_OK, EXIT_PARTIAL, main


@pytest.fixture(scope="module")
def workdir(cli_model_dir: Path) -> Path:
    """The session's CLI folder: ``labelled.csv`` (the scenario) and ``model/`` from
    ``cascade train --taxonomy demo``. Read-only: tests write under ``tmp_path``."""
    return cli_model_dir


def test_train_writes_a_model_with_held_out_metrics(workdir: Path) -> None:
    meta = json.loads((workdir / "model" / "model.json").read_text())
    assert meta["kind"] == "url-model"
    assert 0 <= meta["metrics"]["accuracy"] <= 1
    assert meta["metrics"]["split"]["method"] == "time+domain"


def test_score_counts_bad_lines_and_goes_on(workdir: Path, tmp_path: Path, capsys) -> None:
    src = tmp_path / "mixed.txt.gz"
    with gzip.open(src, "wt", encoding="utf-8") as fh:
        fh.write("https://www.spinjackpot-odds.example/casino\n")
        fh.write("ftp://not-web.example/\n")
        fh.write("http://exa mple.test/\n")
        fh.write("news.harborgazette.test/articles\n")
    out = tmp_path / "verdicts.jsonl"
    code = main(["score", "--model", str(workdir / "model"), "--input", str(src),
                 "--output", str(out)])
    assert code == EXIT_PARTIAL
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    assert [r["url"] for r in rows] == ["https://www.spinjackpot-odds.example/casino",
                                        "http://news.harborgazette.test/articles"]
    assert all(r["stage"] == "url" and 0 <= r["confidence"] <= 1 for r in rows)
    summary = json.loads(capsys.readouterr().err.strip().splitlines()[-1])
    assert summary["input"]["bad"] == 2
    assert summary["input"]["samples"][0]["line_no"] == 2
    assert "scheme" in summary["input"]["samples"][0]["reason"]


def test_score_urls_on_the_command_line_as_csv(workdir: Path, capsys) -> None:
    code = main(["--quiet", "score", "--model", str(workdir / "model"),
                 "--output-format", "csv", "lnk.test/Ab3dE", "https://m.blue-album.example/"])
    assert code == EXIT_OK
    lines = capsys.readouterr().out.strip().splitlines()
    assert lines[0].startswith("line,input,url,category,confidence")
    assert len(lines) == 3


def test_explain_prints_contributions(workdir: Path, capsys) -> None:
    code = main(["explain", "--model", str(workdir / "model"), "--json",
                 "https://www.spinjackpot-odds.example/casino/live"])
    assert code == EXIT_OK
    exp = json.loads(capsys.readouterr().out)
    assert exp["classes"][0]["top"]


def test_evaluate_writes_metrics(workdir: Path, tmp_path: Path) -> None:
    out = tmp_path / "metrics.json"
    code = main(["--quiet", "evaluate", "--model", str(workdir / "model"), "--input",
                 str(workdir / "labelled.csv"), "--output", str(out)])
    assert code == EXIT_OK
    metrics = json.loads(out.read_text())
    assert {"accuracy", "macro_f1", "ece_15", "per_class", "weighted"} <= set(metrics)


@pytest.mark.parametrize("command", ["train", "score", "explain", "evaluate", "fetch", "refine",
                                     "plan", "report", "demo"])
def test_every_command_has_help(command: str, capsys) -> None:
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    assert "exit codes" in capsys.readouterr().out


def test_real_process_reads_stdin_and_reports_exit_code(workdir: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "cascade.cli", "score", "--model", str(workdir / "model")],
        input="example.com\n\x00bad\x01 url\n", capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == EXIT_PARTIAL, proc.stderr
    assert len(proc.stdout.strip().splitlines()) == 1
    assert "Traceback" not in proc.stderr


def test_fetch_command_prints_results_and_refuses_private_targets(capsys) -> None:
    from hostile_cases import HostileSiteFarm

    with HostileSiteFarm() as farm:
        code = main(["--quiet", "fetch", "--resolve", "site.test:127.0.0.1",
                     "--resolve", "inside.test:10.1.2.3", "--allow-network", "127.0.0.1/32",
                     "--port", str(farm.port), "--deadline", "3",
                     farm.url("site.test", "/_hostile/page"),
                     farm.url("inside.test", "/")])
    assert code == EXIT_OK
    rows = {r["url"]: r for r in map(json.loads, capsys.readouterr().out.splitlines())}
    assert rows[farm.url("site.test", "/_hostile/page")]["outcome"] == "ok"
    assert rows[farm.url("inside.test", "/")]["outcome"] == "blocked-address"


def test_plan_with_a_url_only_model_ranks_by_confidence(workdir: Path, capsys) -> None:
    code = main(["plan", "-m", str(workdir / "model"), "--budget", "2",
                 "-i", str(workdir / "labelled.csv")])
    assert code == EXIT_OK
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    # chance of a wrong verdict x category cost x lookups, best first
    assert len(rows) == 2 and rows[0]["expected_gain"] >= rows[1]["expected_gain"] > 0
    assert "no fetch-value model" in captured.err


def test_train_defaults_are_the_url_models_own() -> None:
    # `cascade train` with no options must fit the same model as `UrlModel()`
    import inspect

    from cascade.cli import URL_MODEL_DEFAULTS
    from cascade.models.url_model import UrlModel

    sig = {k: v.default for k, v in inspect.signature(UrlModel).parameters.items()}
    d = URL_MODEL_DEFAULTS
    assert (d["ngram_min"], d["ngram_max"]) == sig["ngram_range"]
    assert 2 ** d["hash_bits"] == sig["n_features"]
    for name in ("C", "tol", "max_iter", "class_balance"):
        assert d[name] == sig[name], name
