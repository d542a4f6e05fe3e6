"""The fetch options of ``cascade fetch`` and ``cascade refine``: each maps to its
``FetchPolicy`` field, shows its default, and a bad value is a usage error (exit 2).

No test here fetches over the network: the URLs are refused before any connection (a
``bad-url`` scheme or a blocked address), or the command stops at its options.
"""

from __future__ import annotations

import argparse
import re

import pytest

from cascade.cli import (
    EXIT_NO_FETCH,
    EXIT_USAGE,
    _add_fetch_options,
    _fetch_setup,
    build_parser,
    main,
)
from cascade.fetch import FetchPolicy

OFFLINE_URL = "ftp://nowhere.test/"  # refused as bad-url before any lookup or connection
WARNING = "no --operator given"


def _policy(*options: str) -> FetchPolicy:
    args = build_parser().parse_args(["fetch", *options, OFFLINE_URL])
    return _fetch_setup(args)[0]


def test_new_options_map_to_the_policy() -> None:
    policy = _policy("--operator", "mailto:ops@example.org", "--per-host-concurrency", "3",
                     "--per-host-delay", "1.5", "--max-queue", "7",
                     "--allow-network", "127.0.0.1/32")
    assert policy.per_host_concurrency == 3
    assert policy.per_host_delay_s == 1.5
    assert policy.max_queue_s == 7.0
    assert policy.allow_wide_networks is False
    assert "mailto:ops@example.org" in policy.user_agent


def test_defaults_are_the_policys_defaults() -> None:
    policy, default = _policy("--operator", "mailto:ops@example.org"), FetchPolicy()
    for name in ("ports", "deadline_s", "max_bytes", "max_redirects", "per_host_concurrency",
                 "per_host_delay_s", "max_queue_s", "obey_robots", "allow_networks",
                 "allow_wide_networks"):
        assert getattr(policy, name) == getattr(default, name), name


EXPECTED_DEFAULTS = {
    "--deadline": "10.0", "--max-bytes": str(2 << 20), "--max-redirects": "5",
    "--per-host-concurrency": "2", "--per-host-delay": "0.5", "--max-queue": "60.0",
    "--dangerously-allow-wide-networks": "False", "--ignore-robots": "False",
    "--port": "80 and 443", "--resolve": "none", "--allow-network": "none",
    "--operator": "none",
}


def test_every_fetch_option_shows_its_default() -> None:
    parser = argparse.ArgumentParser()
    _add_fetch_options(parser)
    shown = {}
    for action in parser._actions:
        if action.option_strings == ["-h", "--help"]:
            continue
        help_text = " ".join((action.help % {"default": action.default}).split())
        found = re.search(r"default: ([^);,]+)", help_text)
        assert found, action.option_strings
        shown[action.option_strings[0]] = found.group(1)
    assert set(shown) == set(EXPECTED_DEFAULTS)
    for option, default in EXPECTED_DEFAULTS.items():
        assert shown[option].startswith(default), (option, shown[option])


@pytest.mark.parametrize("command", ["fetch", "refine"])
def test_both_fetching_commands_list_the_new_options(command: str, capsys) -> None:
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    for option in ("--per-host-concurrency", "--per-host-delay", "--max-queue",
                   "--dangerously-allow-wide-networks"):
        assert option in out


def test_missing_operator_warns_once_on_stderr(capsys) -> None:
    code = main(["--quiet", "fetch", OFFLINE_URL])
    assert code == EXIT_NO_FETCH  # the one fetch is refused: "every fetch failed"
    err = capsys.readouterr().err
    assert err.count(WARNING) == 1
    assert [line for line in err.splitlines() if WARNING in line][0].startswith("fetch: ")


def test_an_operator_silences_the_warning(capsys) -> None:
    code = main(["--quiet", "fetch", "--operator", "https://ops.example.org/fetcher",
                 OFFLINE_URL])
    assert code == EXIT_NO_FETCH
    assert WARNING not in capsys.readouterr().err


@pytest.mark.parametrize("operator", ["a\r\nb", "a\nX-Injected: 1", "a\rb", "a\tb", "a\x7fb",
                                      "", "   "])
def test_operator_with_control_characters_or_empty_is_a_usage_error(operator: str,
                                                                    capsys) -> None:
    # a CR or LF in the User-Agent would end the header line and start a forged one
    code = main(["--quiet", "fetch", "--operator", operator, OFFLINE_URL])
    assert code == EXIT_USAGE
    assert "--operator" in capsys.readouterr().err


@pytest.mark.parametrize("network", ["0.0.0.0/0", "::/0", "8.0.0.0/8", "2001:4860::/32"])
def test_a_wide_allow_network_is_a_usage_error(network: str, capsys) -> None:
    code = main(["--quiet", "fetch", "--operator", "mailto:ops@example.org",
                 "--allow-network", network, OFFLINE_URL])
    assert code == EXIT_USAGE
    assert "--dangerously-allow-wide-networks" in capsys.readouterr().err


def test_the_dangerous_flag_accepts_a_wide_network_and_says_so(capsys) -> None:
    policy = _policy("--operator", "mailto:ops@example.org", "--allow-network", "0.0.0.0/0",
                     "--dangerously-allow-wide-networks")
    assert policy.allow_wide_networks is True
    assert [str(n) for n in policy.allow_networks] == ["0.0.0.0/0"]
    assert "--dangerously-allow-wide-networks" in capsys.readouterr().err


@pytest.mark.parametrize("options", [["--per-host-concurrency", "0"],
                                     ["--per-host-delay", "-1"],
                                     ["--max-queue", "0"],
                                     ["--deadline", "-3"],
                                     ["--allow-network", "not-a-network"]])
def test_out_of_range_values_are_usage_errors(options: list[str], capsys) -> None:
    try:  # refused by argparse (a count below its minimum) or by FetchPolicy
        code = main(["--quiet", "fetch", "--operator", "mailto:ops@example.org", *options,
                     OFFLINE_URL])
    except SystemExit as exc:
        code = exc.code
    assert code == EXIT_USAGE
    assert "error" in capsys.readouterr().err


def test_a_non_number_is_an_argparse_usage_error() -> None:
    with pytest.raises(SystemExit) as info:
        main(["fetch", "--per-host-concurrency", "two", OFFLINE_URL])
    assert info.value.code == EXIT_USAGE
