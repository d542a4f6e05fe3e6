"""The command as its users meet it: options and output paths checked before any work,
output rows that join back to their input, labels that would silently split or vanish,
files that are not text, one budget syntax, work kept when a run is stopped (a real
process killed with SIGTERM), and an exit code for "every fetch failed"."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import cascade.training
from cascade.cli import (
    EXIT_FILE,
    EXIT_NO_FETCH,
    EXIT_OK,
    EXIT_TERMINATED,
    EXIT_USAGE,
    PRECISION_TARGET,
    build_parser,
    main,
)

URL = "https://www.spinjackpot-odds.example/casino"


@pytest.fixture()
def model(cli_model_dir: Path) -> Path:
    return cli_model_dir / "model"


def _usage(argv: list[str], capsys) -> str:
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == EXIT_USAGE
    return capsys.readouterr().err


# ------------------------------------------------------------------ checked before any work
def test_urls_and_an_input_file_together_are_refused(model: Path, tmp_path: Path,
                                                     capsys) -> None:
    listing = tmp_path / "today.txt"
    listing.write_text("http://a.example/\nhttp://b.example/\n")
    code = main(["score", "-m", str(model), "--input", str(listing), "http://one.example/"])
    assert code == EXIT_USAGE
    assert "not both" in capsys.readouterr().err


@pytest.mark.parametrize("top", ["0", "-1", "x"])
def test_top_must_be_a_positive_whole_number(model: Path, top: str, capsys) -> None:
    err = _usage(["score", "-m", str(model), "--top", top, URL], capsys)
    assert "--top" in err and "Traceback" not in err


def test_an_output_in_a_missing_folder_is_refused_before_scoring(model: Path, tmp_path: Path,
                                                                 capsys, monkeypatch) -> None:
    called = []
    monkeypatch.setattr("cascade.bundle.ModelBundle.load", lambda *a: called.append(a))
    code = main(["score", "-m", str(model), "-o", str(tmp_path / "missing" / "out.jsonl"),
                 URL])
    err = capsys.readouterr().err
    assert code == EXIT_USAGE and "does not exist" in err and "Traceback" not in err
    assert not called  # no model was even loaded


@pytest.mark.parametrize("kind", ["file", "other-folder"])
def test_train_refuses_a_bad_model_path_before_fitting(cli_model_dir: Path, tmp_path: Path,
                                                       kind: str, capsys,
                                                       monkeypatch) -> None:
    target = tmp_path / "m"
    if kind == "file":
        target.write_text("not a model")
    else:
        target.mkdir()
        (target / "notes.txt").write_text("keep me")
    monkeypatch.setattr(cascade.training, "train",
                        lambda *a, **k: pytest.fail("the fit ran before the path check"))
    code = main(["train", "-i", str(cli_model_dir / "labelled.csv"), "-m", str(target)])
    assert code == EXIT_USAGE
    assert "--model" in capsys.readouterr().err
    assert (target.read_text() == "not a model") if kind == "file" else \
        (target / "notes.txt").exists()


def test_one_budget_syntax_everywhere() -> None:
    from cascade.budget import Budget, parse_share

    # a share as a percentage or a decimal, a count as a whole number: every command
    assert Budget.parse("10%").max_fraction == pytest.approx(0.1)
    assert Budget.parse("0.1").max_fraction == pytest.approx(0.1)
    assert Budget.parse("500").max_fetches == 500
    assert parse_share("30%") == parse_share("0.3") == pytest.approx(0.3)
    for bad in ("3", "130%", "-0.1", "ten"):
        with pytest.raises(ValueError):
            parse_share(bad)
    parser = build_parser()
    demo = parser.parse_args(["demo", "--budget", "10%", "--output", "x"])
    report = parser.parse_args(["report", "-i", "f.csv", "-m", "m", "--out", "r",
                                "--operating-budget", "25%"])
    assert demo.budget == pytest.approx(0.1) and demo.out == "x"
    assert report.operating_budget == pytest.approx(0.25) and report.out == "r"
    evaluate = parser.parse_args(["evaluate", "-i", "f.csv", "-m", "m"])
    assert evaluate.precision_target == report.precision_target == PRECISION_TARGET


def test_every_option_says_what_it_does(capsys) -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    missing = [f"{name} {action.option_strings[0]}"
               for name, p in sub.choices.items() for action in p._actions
               if action.option_strings and action.help in (None, "")
               and action.dest != "help"]
    assert not missing, missing


# ------------------------------------------------------------------ joined back to the input
def test_verdicts_keep_the_input_string_line_and_columns(model: Path, tmp_path: Path) -> None:
    # RFC 3986 section 7.4 / WHATWG URL host parsing: 0x7f000001 and 2130706433 are two
    # spellings of 127.0.0.1, so the normalized url is the same and only 'input' tells
    # them apart
    src = tmp_path / "log.csv"
    src.write_text("url,user_group,count\nhttp://0x7f000001/,lab,2\nhttp://2130706433/,desk,1\n"
                   "http://b\u00fccher.example/,desk,1\n")
    out = tmp_path / "out.csv"
    assert main(["--quiet", "score", "-m", str(model), "-i", str(src), "-o", str(out)]) \
        == EXIT_OK
    rows = list(csv.DictReader(out.open()))
    assert [r["line"] for r in rows] == ["2", "3", "4"]
    assert rows[0]["url"] == rows[1]["url"] == "http://127.0.0.1/"
    assert [r["input"] for r in rows[:2]] == ["http://0x7f000001/", "http://2130706433/"]
    assert rows[2]["url"] == "http://xn--bcher-kva.example/"  # RFC 3492 punycode
    assert rows[2]["input"] == "http://b\u00fccher.example/"
    assert [r["user_group"] for r in rows] == ["lab", "desk", "desk"]


# ------------------------------------------------------------------ labels
def _labelled(path: Path, rows: list[tuple[str, str]]) -> Path:
    with path.open("w", newline="") as fh:
        out = csv.writer(fh)
        out.writerow(["host", "category"])
        out.writerows(rows)
    return path


def _rows(n: int) -> list[tuple[str, str]]:
    words = {"Media sharing": "clip", "news": "gazette", "betting": "odds"}
    return [(f"{words[c]}{i}.example", c) for i in range(n) for c in words]


def test_case_variants_are_named_and_folded_on_request(tmp_path: Path, capsys) -> None:
    rows = _rows(30) + [("clipx1.example", "Media Sharing"), ("clipx2.example", "Media Sharing")]
    src = _labelled(tmp_path / "hosts.csv", rows)
    argv = ["train", "-i", str(src), "--url-column", "host", "--label-column", "category",
            "--holdout", "0", "--max-iter", "30", "--hash-bits", "16"]
    assert main([*argv, "-m", str(tmp_path / "apart")]) == EXIT_OK
    err = capsys.readouterr().err
    assert "differ only in case" in err and "'Media Sharing' (2 rows)" in err
    apart = json.loads((tmp_path / "apart" / "model.json").read_text())
    assert {"Media sharing", "Media Sharing"} <= set(apart["classes"])
    assert main([*argv, "-m", str(tmp_path / "folded"), "--fold-case"]) == EXIT_OK
    folded = json.loads((tmp_path / "folded" / "model.json").read_text())
    assert "Media Sharing" not in folded["classes"] and "Media sharing" in folded["classes"]


def test_categories_without_rows_are_named_and_kept_or_dropped(tmp_path: Path,
                                                               capsys) -> None:
    taxonomy = tmp_path / "cats.toml"
    taxonomy.write_text('[taxonomy]\nname = "t"\n' + "".join(
        f'[[category]]\nname = "{c}"\n' for c in ("Media sharing", "news", "betting",
                                                  "dating")))
    src = _labelled(tmp_path / "hosts.csv", _rows(30))
    argv = ["train", "-i", str(src), "--url-column", "host", "--label-column", "category",
            "-t", str(taxonomy), "--holdout", "0", "--max-iter", "30", "--hash-bits", "16"]
    assert main([*argv, "-m", str(tmp_path / "kept")]) == EXIT_OK
    assert "never predict them: 'dating'" in capsys.readouterr().err
    assert main([*argv, "-m", str(tmp_path / "dropped"), "--absent-categories",
                 "drop"]) == EXIT_OK
    assert "left out of the model: 'dating'" in capsys.readouterr().err
    kept = json.loads((tmp_path / "kept" / "model.json").read_text())["classes"]
    dropped = json.loads((tmp_path / "dropped" / "model.json").read_text())["classes"]
    assert "dating" in kept and "dating" not in dropped


def test_a_label_only_on_the_held_out_side_does_not_abort(tmp_path: Path) -> None:
    # the holdout keeps each registered domain on one side: the one 'dating' domain lands
    # on one side only, whichever it is
    rows = _rows(30) + [("meet.example", "dating")]
    src = _labelled(tmp_path / "hosts.csv", rows)
    code = main(["--quiet", "train", "-i", str(src), "--url-column", "host",
                 "--label-column", "category", "-m", str(tmp_path / "m"),
                 "--max-iter", "30", "--hash-bits", "16"])
    assert code == EXIT_OK


def test_a_semicolon_file_is_read_by_its_header(tmp_path: Path) -> None:
    from cascade.io import read_records

    path = tmp_path / "labels.csv"
    path.write_text("url;label\nhttp://a.example/;news\n")
    (rec,) = list(read_records(path))
    assert (rec.url, rec.label) == ("http://a.example/", "news")


# ------------------------------------------------------------------ not text
def test_utf16_input_is_scored_and_binary_input_is_one_clear_error(model: Path,
                                                                   tmp_path: Path,
                                                                   capsys) -> None:
    text = tmp_path / "utf16.txt"
    text.write_bytes(f"{URL}\nhttp://b.example/\n".encode("utf-16"))  # with its BOM
    assert main(["--quiet", "score", "-m", str(model), "-i", str(text)]) == EXIT_OK
    assert len(capsys.readouterr().out.splitlines()) == 2
    noise = tmp_path / "noise.txt"
    noise.write_bytes(bytes(range(256)) * 4 + b"\nhttp://c/\n")
    assert main(["score", "-m", str(model), "-i", str(noise)]) == EXIT_FILE
    captured = capsys.readouterr()
    assert "not a text file" in captured.err and captured.out == ""


# ------------------------------------------------------------------ fetches
def test_every_fetch_failing_has_its_own_exit_code(capsys) -> None:
    # the address guard refuses loopback (RFC 6890: 127.0.0.0/8 is not globally
    # reachable), so no packet is sent and every fetch fails
    code = main(["fetch", "--operator", "mailto:ops@example.org",
                 "http://127.0.0.1:9/", "http://[::1]:9/"])
    assert code == EXIT_NO_FETCH
    assert "every fetch failed (2 of 2)" in capsys.readouterr().err


# ------------------------------------------------------------------ stopped midway
def test_sigterm_keeps_the_rows_written_and_says_so(model: Path, tmp_path: Path) -> None:
    src = tmp_path / "big.txt"
    with src.open("w") as fh:
        for i in range(400_000):
            fh.write(f"http://site{i}.example/page/{i}\n")
    out = tmp_path / "out.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "cascade.cli", "score", "-m", str(model),
                             "-i", str(src), "-o", str(out)], stderr=subprocess.PIPE,
                            text=True)
    tmp = Path(f"{out}.tmp")
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and (not tmp.exists() or tmp.stat().st_size < 10_000):
        time.sleep(0.05)
    assert tmp.exists(), "the scorer never started writing"
    os.kill(proc.pid, signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == EXIT_TERMINATED, err
    partial = Path(f"{out}.partial")
    assert not tmp.exists() and not out.exists() and partial.exists()
    rows = [json.loads(line) for line in partial.read_text().splitlines()]
    assert rows and [r["line"] for r in rows] == list(range(1, len(rows) + 1))
    assert "SIGTERM" in err and str(partial) in err


# ------------------------------------------------------------------ one config file
def test_a_config_file_sets_options_and_the_command_line_wins(tmp_path: Path, capsys,
                                                              monkeypatch) -> None:
    config = tmp_path / "cascade.toml"
    config.write_text('[fetch]\nper_host_delay = 2.5\nresolve = { "*.farm.test" = '
                      '"127.0.0.1" }\nallow_network = ["127.0.0.1/32"]\n'
                      '[input]\nurl_column = "host"\n[budget]\nbudget = "10%"\n')
    assert main(["--config", str(config), "config", "night"]) == EXIT_OK
    shown = json.loads(capsys.readouterr().out)["options"]
    assert shown["--per-host-delay"] == {"value": 2.5, "from": "config file"}
    assert shown["--resolve"]["value"] == ["*.farm.test:127.0.0.1"]
    assert shown["--budget"] == {"value": "10%", "from": "config file"}
    assert shown["--deadline"]["from"] == "default"
    # the environment names the file too; an option on the command line wins over it
    monkeypatch.setenv("CASCADE_CONFIG", str(config))
    from cascade.cli import _apply_config, load_settings

    parser = build_parser()
    _apply_config(parser, load_settings(None), "plan")
    args = parser.parse_args(["plan", "-m", "m", "--budget", "5", "http://a.example/"])
    assert args.budget == "5" and args.url_column == "host"
    # a list option given on the command line replaces the file's list, never adds to it
    # (the file's hole in the address guard must not survive a narrower command line)
    captured = {}
    monkeypatch.setattr("cascade.cli.cmd_fetch", lambda a: captured.update(vars(a)) or 0)
    parser_args = ["fetch", "--allow-network", "127.0.0.2/32", "http://a.example/"]
    assert main(parser_args) == EXIT_OK
    assert captured["allow_network"] == ["127.0.0.2/32"]
    assert main(["fetch", "http://a.example/"]) == EXIT_OK
    assert captured["allow_network"] == ["127.0.0.1/32"]
    assert captured["resolve"] == ["*.farm.test:127.0.0.1"]


@pytest.mark.parametrize("text, message", [
    ("[fetch]\nper_host_dely = 1\n", "no key 'per_host_dely'"),
    ("[nonsense]\nx = 1\n", "unknown section"),
    ("[fetch\n", "not valid TOML"),
    ("[fetch]\nper_host_concurrency = 0\n", "at least"),
    ('[fetch]\nignore_robots = "false"\n', "TOML boolean"),
])
def test_a_bad_config_file_is_a_usage_error(tmp_path: Path, capsys, text: str,
                                            message: str) -> None:
    config = tmp_path / "cascade.toml"
    config.write_text(text)
    assert main(["--config", str(config), "config", "fetch"]) == EXIT_USAGE
    assert message in capsys.readouterr().err


def test_config_values_are_checked_only_for_the_command_run(tmp_path: Path) -> None:
    # [fetch] port (a list) does not break serve's single --port; a fetch count does not
    # break demo's share; the file never picks where train writes a model
    config = tmp_path / "cascade.toml"
    config.write_text('[fetch]\nport = [8080]\n[budget]\nbudget = "500"\n'
                      '[output]\nmodel = "prod-model"\n')
    from cascade.cli import _apply_config, load_settings

    for command, dest, expected in (("serve", "port", 8787), ("plan", "budget", "500"),
                                    ("train", "model", None)):
        parser = build_parser()
        later, _ = _apply_config(parser, load_settings(str(config)), command)
        sub = next(a for a in parser._actions if a.dest == "command").choices[command]
        default = next(a for a in sub._actions if a.dest == dest).default
        assert default == expected, (command, dest, default)


def test_a_resolve_wildcard_covers_every_name_below_its_parent() -> None:
    import asyncio

    from cascade.fetch.resolver import (
        ResolutionError,
        StaticResolver,
        parse_resolve_overrides,
    )

    resolver = StaticResolver(parse_resolve_overrides(["*.farm.test:127.0.0.1",
                                                       "a.farm.test:127.0.0.2"]))
    assert asyncio.run(resolver.resolve("x.y.farm.test", 80)) == ["127.0.0.1"]
    assert asyncio.run(resolver.resolve("a.farm.test", 80)) == ["127.0.0.2"]  # exact first
    with pytest.raises(ResolutionError):
        asyncio.run(resolver.resolve("farm.test", 80))  # the parent itself is not covered
    with pytest.raises(ValueError, match="wildcard"):
        parse_resolve_overrides(["farm.*.test:127.0.0.1"])


# ------------------------------------------------------------------ explain
def test_explain_shows_spans_with_their_place_and_the_bias_apart(model: Path,
                                                                 capsys) -> None:
    assert main(["explain", "-m", str(model), "--classes", "1",
                 "https://www.spinjackpot-odds.example/casino"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "bias" in out and "everything not listed above" in out
    assert ' host   "' in out or ' path   "' in out  # quoted spans, with their place


def test_spans_add_up_to_the_character_ngram_contributions(url_model) -> None:
    # exactness: the spans plus the tokens plus the bias give the logit (the linear
    # decomposition), up to the characters under the 2% floor
    exp = url_model.explain("https://www.spinjackpot-odds.example/casino/live", top=10_000,
                            n_classes=1)
    (cls,) = exp.classes
    places = ("host:", "domain:", "suffix:", "path:", "query:")
    tokens = sum(c.value for c in cls.contributions if c.kind == "token")
    # a hashed column shared by a token and a character n-gram holds both shares
    mixed = sum(abs(c.value) for c in cls.contributions if c.kind == "chars"
                and any(part.startswith(places) for part in c.feature.split(" | ")))
    spans = sum(sp.value for sp in cls.spans)
    biggest = max(abs(sp.value) for sp in cls.spans)
    assert abs(cls.logit - (cls.bias + tokens + spans)) <= mixed + 0.05 * biggest + 1e-9
    assert {sp.place for sp in cls.spans} <= {"host", "path"}


def test_score_on_a_terminal_prints_a_table(model: Path) -> None:
    import pty

    leader, follower = pty.openpty()
    proc = subprocess.run([sys.executable, "-m", "cascade.cli", "--quiet", "score", "-m",
                           str(model), URL], stdout=follower, stderr=subprocess.PIPE,
                          timeout=120, check=False)
    os.close(follower)
    chunks = []
    while True:
        try:
            data = os.read(leader, 65536)
        except OSError:  # the terminal closed: all read
            break
        if not data:
            break
        chunks.append(data)
    os.close(leader)
    text = b"".join(chunks).decode()
    assert proc.returncode == EXIT_OK, proc.stderr
    lines = text.strip().splitlines()
    assert lines[0].split()[:2] == ["line", "URL"] and URL in lines[1]
    assert not text.lstrip().startswith("{")


def test_refine_resume_skips_the_urls_already_refined(cli_pages_dir: Path, tmp_path: Path,
                                                      capsys) -> None:
    # no packet leaves the machine: both names are answered locally with a loopback
    # address, which the address guard refuses (RFC 6890), so each fetch fails at once
    partial = tmp_path / "out.jsonl.partial"
    partial.write_text(json.dumps({"url": "http://a.example/"}) + "\n")
    out = tmp_path / "rest.jsonl"
    code = main(["refine", "-m", str(cli_pages_dir / "model"), "--operator",
                 "mailto:ops@example.org", "--resolve", "*.example:127.0.0.1",
                 "--deadline", "2", "--resume", str(partial),
                 "-o", str(out), "http://a.example/", "http://b.example/"])
    assert code in (EXIT_OK, EXIT_NO_FETCH)
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    # the earlier rows are copied first, then the rest: the new output is the whole result
    assert [r["url"] for r in rows] == ["http://a.example/", "http://b.example/"]
    assert "1 URLs already refined" in capsys.readouterr().err


def test_a_second_stop_never_replaces_the_rows_of_the_first(tmp_path: Path) -> None:
    from cascade.io import open_writer

    target = tmp_path / "out.jsonl"
    partials = []
    for rows in (3, 2):
        try:
            with open_writer(target) as out:
                for i in range(rows):
                    out.write({"url": f"http://h{i}.example/"})
                raise KeyboardInterrupt
        except KeyboardInterrupt as exc:
            partials += [p for p, _ in exc.partial_outputs]
    assert [Path(p).name for p in partials] == ["out.jsonl.partial", "out.jsonl.partial-2"]
    assert len(Path(partials[0]).read_text().splitlines()) == 3


def test_csv_output_from_json_lines_with_varying_fields_does_not_crash(model: Path,
                                                                      tmp_path: Path,
                                                                      capsys) -> None:
    src = tmp_path / "in.jsonl"
    src.write_text('{"url": "http://a.example/", "a": "1"}\n'
                   '{"url": "http://b.example/", "b": "2"}\n')
    out = tmp_path / "out.csv"
    assert main(["score", "-m", str(model), "-i", str(src), "-o", str(out)]) == EXIT_OK
    rows = list(csv.DictReader(out.open()))
    assert [r["a"] for r in rows] == ["1", ""] and [r["b"] for r in rows] == ["", "2"]


def test_a_report_from_a_url_only_model_is_refused(cli_model_dir: Path, tmp_path: Path,
                                                   capsys) -> None:
    code = main(["report", "-m", str(cli_model_dir / "model"), "-i",
                 str(cli_model_dir / "labelled.csv"), "-o", str(tmp_path / "r")])
    assert code == EXIT_FILE
    assert "URL-only model" in capsys.readouterr().err
    assert not (tmp_path / "r" / "report.json").exists()


def test_spans_never_cut_a_character_of_an_internationalized_host(url_model) -> None:
    # RFC 3492 / IDNA: the model reads the Unicode host; a span is whole characters
    exp = url_model.explain("http://b\u00fccher-\u00fcber.example.de/k\u00e4se", top=5,
                            n_classes=2)
    texts = [sp.text for cls in exp.classes for sp in cls.spans]
    assert texts and not any("\ufffd" in t for t in texts)


def test_night_reads_a_log_with_its_own_column_name_and_separator(model: Path,
                                                                 tmp_path: Path) -> None:
    log = tmp_path / "log.csv"
    log.write_text("site;hits\nnews.harborgazette.test;3\nspinjackpot-odds.example;1\n")
    code = main(["--quiet", "night", "--log", str(log), "-m", str(model), "--store",
                 str(tmp_path / "v.sqlite"), "-o", str(tmp_path / "night"), "--budget", "0",
                 "--url-column", "site", "--delimiter", ";"])
    assert code == EXIT_OK
    report = json.loads((tmp_path / "night" / "night-report.json").read_text())
    assert report["decided"] == 2 and report["input"]["bad"] == 0
