"""Every row of the CLI's exit-code table (``cascade.cli.EXIT_CODES``), each through
``cascade.cli.main`` the way a user meets it; and the lazy public surface of ``cascade``."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import cascade.cli
from cascade.bundle import ModelBundle
from cascade.cli import (
    EXIT_BUG,
    EXIT_FILE,
    EXIT_INTERRUPTED,
    EXIT_OK,
    EXIT_PARTIAL,
    EXIT_USAGE,
    main,
)
from cascade.errors import InvalidURL

GOOD_URL = "https://www.spinjackpot-odds.example/casino"


@pytest.fixture()
def model(cli_model_dir: Path) -> Path:
    return cli_model_dir / "model"


@pytest.fixture()
def labelled(tmp_path: Path) -> Path:
    path = tmp_path / "labelled.csv"
    path.write_text("url,label\nhttps://a.example/casino,betting\nhttps://b.example/news,news\n")
    return path


def test_exit_codes_are_the_documented_ones() -> None:
    assert (EXIT_OK, EXIT_BUG, EXIT_USAGE, EXIT_PARTIAL, EXIT_FILE, EXIT_INTERRUPTED) == \
        (0, 1, 2, 3, 4, 130)


# ---------------------------------------------------------------------------- 0
def test_a_good_run_exits_0(model: Path, capsys) -> None:
    assert main(["--quiet", "score", "--model", str(model), GOOD_URL]) == EXIT_OK
    (row,) = map(json.loads, capsys.readouterr().out.splitlines())
    assert row["url"] == GOOD_URL and row["stage"] == "url"


# ---------------------------------------------------------------------------- 2
def test_an_unknown_option_exits_2_from_argparse() -> None:
    with pytest.raises(SystemExit) as info:
        main(["score", "--no-such-option"])
    assert info.value.code == EXIT_USAGE


def test_a_bad_option_value_is_a_usage_error_exit_2(model: Path, capsys) -> None:
    code = main(["plan", "-m", str(model), "--budget", "lots", GOOD_URL])
    assert code == EXIT_USAGE
    err = capsys.readouterr().err
    assert "budget" in err and "Traceback" not in err


def test_an_invalid_url_that_ends_a_command_exits_2(model: Path, monkeypatch, capsys) -> None:
    # No command lets one through today (URLs are input items, counted: see the exit-3
    # tests); the table still maps it to a usage error, not to a bug.
    def bad_url(args):
        raise InvalidURL("exa mple", "space in host")

    monkeypatch.setattr(cascade.cli, "cmd_score", bad_url)
    assert main(["score", "--model", str(model), "x"]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "invalid URL" in err and "Traceback" not in err


# ---------------------------------------------------------------------------- 3
def test_bad_input_lines_are_skipped_and_exit_3(model: Path, tmp_path: Path, capsys) -> None:
    src = tmp_path / "urls.txt"
    src.write_text(f"{GOOD_URL}\nftp://not-web.example/\n")
    code = main(["score", "--model", str(model), "--input", str(src)])
    assert code == EXIT_PARTIAL
    captured = capsys.readouterr()
    assert len(captured.out.splitlines()) == 1
    assert json.loads(captured.err.strip().splitlines()[-1])["input"]["bad"] == 1


def test_explain_counts_a_bad_url_argument_and_exits_3(model: Path, capsys) -> None:
    # A URL given to explain is an input item like a line of a file: the good ones are
    # explained, the bad one is named on stderr, and the run ends "done, some skipped".
    code = main(["explain", "--model", str(model), "--json", GOOD_URL, "http://exa mple.test/"])
    assert code == EXIT_PARTIAL
    captured = capsys.readouterr()
    assert [json.loads(line)["url"] for line in captured.out.splitlines()] == [GOOD_URL]
    assert "invalid URL" in captured.err and "Traceback" not in captured.err


# ---------------------------------------------------------------------------- 4
def test_a_missing_model_directory_exits_4(tmp_path: Path, capsys) -> None:
    code = main(["score", "--model", str(tmp_path / "none"), "example.com"])
    assert code == EXIT_FILE
    assert "not a model directory" in capsys.readouterr().err


def test_a_tampered_model_exits_4(model: Path, tmp_path: Path, capsys) -> None:
    copy = shutil.copytree(model, tmp_path / "model")
    blob = bytearray((copy / "weights.npz").read_bytes())
    blob[len(blob) // 2] ^= 0xFF
    (copy / "weights.npz").write_bytes(bytes(blob))
    assert main(["score", "--model", str(copy), GOOD_URL]) == EXIT_FILE
    err = capsys.readouterr().err
    assert "digest does not match" in err and "Traceback" not in err


@pytest.mark.parametrize(("text", "message"), [(None, "does not exist"),
                                               ("[[category]\n", "not valid TOML")],
                         ids=["missing", "not-toml"])
def test_an_unreadable_taxonomy_exits_4(labelled: Path, tmp_path: Path, capsys, text,
                                        message) -> None:
    taxonomy = tmp_path / "categories.toml"
    if text is not None:
        taxonomy.write_text(text)
    code = main(["--quiet", "train", "-i", str(labelled), "-m", str(tmp_path / "m"),
                 "--taxonomy", str(taxonomy)])
    assert code == EXIT_FILE
    assert message in capsys.readouterr().err
    assert not (tmp_path / "m").exists()


# ---------------------------------------------------------------------------- 1
def test_an_unexpected_error_exits_1_with_a_traceback(model: Path, monkeypatch,
                                                      capsys) -> None:
    def broken(args):
        raise RuntimeError("boom")

    monkeypatch.setattr(cascade.cli, "cmd_score", broken)
    assert main(["score", "--model", str(model), GOOD_URL]) == EXIT_BUG
    err = capsys.readouterr().err
    assert "Traceback" in err and "RuntimeError: boom" in err
    assert "bug in cascade" in err


def test_a_numpy_value_error_inside_a_command_is_a_bug_not_a_usage_error(
        model: Path, monkeypatch, capsys) -> None:
    # ValueError is also the base of cascade's own UsageError and DataError; one that is
    # not cascade's is an internal error (exit 1), never mistaken for the user's.
    def broken(self, urls, **kwargs):
        return np.zeros(2) + np.zeros(3)  # operands could not be broadcast

    monkeypatch.setattr(ModelBundle, "verdicts", broken)
    assert main(["score", "--model", str(model), GOOD_URL]) == EXIT_BUG
    err = capsys.readouterr().err
    assert "Traceback" in err and "ValueError" in err and "bug in cascade" in err


# ---------------------------------------------------------------------------- 130
def test_ctrl_c_exits_130(model: Path, monkeypatch, capsys) -> None:
    def interrupted(self, urls, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(ModelBundle, "verdicts", interrupted)
    assert main(["score", "--model", str(model), GOOD_URL]) == EXIT_INTERRUPTED
    err = capsys.readouterr().err
    assert "interrupted" in err and "Traceback" not in err


# ---------------------------------------------------------------------------- public surface
def test_public_names_import_from_the_package() -> None:
    from cascade import (
        Budget,
        Fetcher,
        FetchPolicy,
        ModelBundle,
        PageModel,
        UrlModel,
        Verdict,
        fit_bundle,
        load_taxonomy,
        normalize,
        open_writer,
        plan,
        read_records,
    )
    from cascade.budget import Budget as budget_class
    from cascade.bundle import ModelBundle as bundle_class
    from cascade.fetch import Fetcher as fetcher_class
    from cascade.models.url_model import UrlModel as url_model_class

    assert (Budget, ModelBundle, Fetcher, UrlModel) == (budget_class, bundle_class,
                                                        fetcher_class, url_model_class)
    for value in (FetchPolicy, PageModel, Verdict, fit_bundle, load_taxonomy, normalize,
                  open_writer, plan, read_records):
        assert callable(value)


def test_every_name_in_the_package_all_resolves() -> None:
    import cascade

    missing = [name for name in cascade.__all__ if getattr(cascade, name, None) is None]
    assert missing == []


def test_importing_cascade_alone_loads_no_numpy_or_sklearn() -> None:
    code = ("import json, sys\nimport cascade\n"
            "print(json.dumps(sorted(m for m in ('numpy', 'scipy', 'sklearn') "
            "if m in sys.modules)))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60, check=True)
    assert json.loads(proc.stdout) == []
