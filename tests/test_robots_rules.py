"""robots.txt rules kept compact (``cascade.fetch.robots.compact_rules``), checked against
protego on the full text: dropping repeated rules must never change an answer."""

from __future__ import annotations

import asyncio

import pytest
from protego import Protego

from cascade.fetch.robots import (
    RobotsCache,
    TooManyRules,
    compact_rules,
    compact_rules_async,
    interpret,
)

TEXT = """# a comment
User-agent: cascade-fetcher
Disallow: /private/
Disallow: /private/
Allow: /private/open/

User-agent: *
Disallow: /private/   # the same line in another group is that group's own rule
Disallow: /tmp/
Disallow: /tmp/
"""
PATHS = ["/", "/private/x", "/private/open/y", "/tmp/z", "/other"]


@pytest.mark.parametrize("agent", ["cascade-fetcher", "other-bot"])
def test_compacting_changes_no_answer(agent) -> None:
    # RFC 9309 section 2.2: a group is its user-agent lines and the rules after them; a
    # repeated rule within a group adds nothing. Reference: protego on the original text.
    full, small = Protego.parse(TEXT), Protego.parse(compact_rules(TEXT))
    for path in PATHS:
        url = f"http://rules.test{path}"
        assert small.can_fetch(url, agent) == full.can_fetch(url, agent), (agent, path)


def test_repeats_are_dropped_per_group_only() -> None:
    lines = compact_rules(TEXT).splitlines()
    assert lines.count("Disallow: /private/") == 2  # once in each group
    assert lines.count("Disallow: /tmp/") == 1
    assert not any(line.startswith("#") for line in lines)


def test_the_async_form_gives_the_same_text() -> None:
    big = "User-agent: *\n" + "Disallow: /a/\nDisallow: /b/\n" * 5000
    assert asyncio.run(compact_rules_async(big, slice_lines=100)) == compact_rules(big)
    assert compact_rules(big).count("\n") == 2


def test_too_many_distinct_rules_mean_disallow_all() -> None:
    many = "User-agent: *\n" + "".join(f"Disallow: /p{i}/\n" for i in range(60))
    with pytest.raises(TooManyRules):
        compact_rules(many, max_rules=50)
    rules = interpret(200, ("User-agent: *\n" + "".join(
        f"Disallow: /p{i}/\n" for i in range(6000))).encode(), "status 200")
    assert rules.kind == "disallow-all" and "distinct rules" in rules.detail
    cache = RobotsCache(60.0)
    try:
        async_rules = asyncio.run(cache.interpret(200, ("User-agent: *\n" + "".join(
            f"Disallow: /p{i}/\n" for i in range(6000))).encode(), "status 200"))
    finally:
        cache.close()
    assert async_rules.kind == "disallow-all"
    assert not async_rules.allows("http://rules.test/", "cascade-fetcher")
