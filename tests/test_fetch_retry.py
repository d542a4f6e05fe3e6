"""``RetryPolicy`` without any server: statuses, Retry-After parsing, give-up and backoff,
validation, and the fetcher's tenacity loop driven by it (``_send`` replaced by a stub)."""

from __future__ import annotations

import asyncio
import dataclasses
import math
from datetime import UTC, datetime

import pytest
from hypothesis import given
from hypothesis import strategies as st

from cascade.fetch import Fetcher, FetchOutcome, FetchPolicy, RetryPolicy
from cascade.fetch.fetcher import _Stop, _Transient
from cascade.urls import normalize

POLICY = RetryPolicy()


def _posix(text: str) -> float:
    return datetime.strptime(text, "%Y-%m-%d %H:%M:%S").replace(tzinfo=UTC).timestamp()


# ---------------------------------------------------------------- defaults
def test_defaults_are_the_fetchers_long_standing_settings() -> None:
    assert POLICY.retries == 2 and POLICY.attempts == 3
    assert POLICY.transient_statuses == (429, 502, 503, 504)
    assert (POLICY.backoff_base_s, POLICY.backoff_cap_s) == (0.1, 2.0)
    assert POLICY.max_retry_after_s == 5.0
    assert FetchPolicy().retry == RetryPolicy()


# ---------------------------------------------------------------- statuses
@pytest.mark.parametrize("status", [429, 502, 503, 504])
def test_transient_statuses_are_retried(status: int) -> None:
    # RFC 6585 section 4 (429); RFC 9110 sections 15.6.3-15.6.5 (502, 503, 504)
    assert POLICY.is_transient(status)


@pytest.mark.parametrize("status", [200, 301, 400, 403, 404, 500, 501, 505])
def test_other_statuses_are_not_retried(status: int) -> None:
    assert not POLICY.is_transient(status)


# ---------------------------------------------------------------- Retry-After
def test_retry_after_in_delay_seconds() -> None:
    # RFC 9110 section 10.2.3, its example "Retry-After: 120"
    assert POLICY.parse_retry_after("120") == 120.0


def test_retry_after_as_an_http_date() -> None:
    # RFC 9110 section 10.2.3, its example "Retry-After: Fri, 31 Dec 1999 23:59:59 GMT"
    now = _posix("1999-12-31 23:57:59")
    assert POLICY.parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=now) == 120.0


def test_retry_after_date_in_the_past_means_no_wait() -> None:
    # RFC 9110 section 10.2.3 example date, read after it has passed
    now = _posix("2000-01-01 00:00:00")
    assert POLICY.parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=now) == 0.0


@pytest.mark.parametrize(
    "value",
    # RFC 9110 section 5.6.7: its examples of the obsolete RFC 850 and asctime forms,
    # which a recipient must accept; asctime carries no zone and is UTC
    ["Sunday, 06-Nov-94 08:49:37 GMT", "Sun Nov  6 08:49:37 1994"],
)
def test_obsolete_http_date_forms_are_read_as_utc(value: str) -> None:
    # RFC 9110 section 5.6.7: the same instant as "Sun, 06 Nov 1994 08:49:37 GMT"
    now = _posix("1994-11-06 08:48:37")
    assert POLICY.parse_retry_after(value, now=now) == 60.0


def test_retry_after_surrounding_whitespace_is_ignored() -> None:
    # RFC 9110 section 5.5: leading and trailing whitespace is not part of a field value
    assert POLICY.parse_retry_after("  7 ") == 7.0


@pytest.mark.parametrize(
    "value",
    # RFC 9110 section 10.2.3: delay-seconds is 1*DIGIT, so signs, fractions and
    # non-ASCII digits are not delay-seconds, and none of these is an HTTP-date
    [None, "", "soon", "-5", "+5", "1.5", "\u00b2", "\u0661\u0662",
     "Fri, 31 Dec 99999 23:59:59 GMT"],
)
def test_unreadable_retry_after_is_none(value: str | None) -> None:
    assert POLICY.parse_retry_after(value) is None


@given(st.text(max_size=60))
def test_retry_after_parsing_never_raises(value: str) -> None:
    wait = POLICY.parse_retry_after(value, now=0.0)
    assert wait is None or (wait >= 0.0 and not math.isnan(wait))


# ---------------------------------------------------------------- giving up
@pytest.mark.parametrize(("wait", "gives_up"),
                         [(None, False), (0.0, False), (5.0, False), (5.01, True),
                          (3600.0, True)])
def test_retry_after_over_the_cap_is_not_waited_for(wait: float | None, gives_up: bool) -> None:
    assert POLICY.gives_up_on(wait) is gives_up


# ---------------------------------------------------------------- backoff
@pytest.mark.parametrize(("attempt", "wait"),
                         [(1, 0.0), (2, 0.1), (3, 0.2), (4, 0.4), (6, 1.6), (7, 2.0),
                          (10_000, 2.0)])
def test_backoff_doubles_from_the_base_up_to_the_cap(attempt: int, wait: float) -> None:
    assert POLICY.wait_before(attempt) == pytest.approx(wait)


def test_a_longer_retry_after_wins_over_the_backoff() -> None:
    assert POLICY.wait_before(2, 1.5) == 1.5
    assert POLICY.wait_before(2, 0.0) == pytest.approx(0.1)
    assert POLICY.wait_before(7, 0.5) == 2.0


@pytest.mark.parametrize("attempt", [0, -1, True, 2.0])
def test_attempts_count_from_one(attempt) -> None:
    with pytest.raises(ValueError, match="counts from 1"):
        POLICY.wait_before(attempt)


# ---------------------------------------------------------------- validation
@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"retries": -1}, "retries"),
        ({"retries": 1.5}, "retries"),
        ({"retries": True}, "retries"),
        ({"transient_statuses": (503, 200)}, "transient_statuses"),
        ({"transient_statuses": (True,)}, "transient_statuses"),
        ({"backoff_base_s": -0.1}, "backoff_base_s"),
        ({"backoff_cap_s": float("nan")}, "backoff_cap_s"),
        ({"backoff_base_s": 3.0}, "backoff_cap_s"),  # over the default 2 s cap
        ({"max_retry_after_s": -1.0}, "max_retry_after_s"),
        ({"max_retry_after_s": "5"}, "max_retry_after_s"),
    ],
)
def test_bad_settings_are_refused_with_the_field_named(kwargs: dict, field: str) -> None:
    with pytest.raises(ValueError, match=f"RetryPolicy.{field}"):
        RetryPolicy(**kwargs)


def test_statuses_are_kept_as_a_tuple_and_the_policy_is_frozen() -> None:
    policy = RetryPolicy(transient_statuses=[503])  # type: ignore[arg-type]
    assert policy.transient_statuses == (503,)
    with pytest.raises(dataclasses.FrozenInstanceError):
        policy.retries = 5  # type: ignore[misc]
    assert hash(policy) == hash(RetryPolicy(transient_statuses=(503,)))
    assert dataclasses.replace(policy, retries=0).attempts == 1


def test_fetch_policy_takes_only_a_retry_policy() -> None:
    with pytest.raises(ValueError, match="FetchPolicy.retry"):
        FetchPolicy(retry=3)  # type: ignore[arg-type]


# ---------------------------------------------------------------- the fetcher's retry loop
@dataclasses.dataclass(frozen=True)
class _RecordingPolicy(RetryPolicy):
    """Records what the fetcher asks, and never waits (so the test never sleeps)."""

    asked: list = dataclasses.field(default_factory=list, compare=False, hash=False)

    def wait_before(self, attempt_number: int, retry_after_s: float | None = None) -> float:
        self.asked.append((attempt_number, retry_after_s))
        return 0.0


def _run_get(retry: RetryPolicy, failures: list[Exception]) -> tuple[object, int]:
    """Run ``Fetcher._get`` with ``_send`` replaced: it raises ``failures`` in turn, then
    answers "done". Returns what ``_get`` returned or raised, and the number of sends."""
    sends = 0

    async def run() -> object:
        nonlocal sends
        async with Fetcher(FetchPolicy(retry=retry)) as fetcher:
            async def send(key, address, max_bytes, truncate=False):
                nonlocal sends
                sends += 1
                if failures:
                    raise failures.pop(0)
                return "done"

            fetcher._send = send  # type: ignore[method-assign]
            try:
                return await fetcher._get(normalize("http://site.test/"), "192.0.2.1", 100)
            except _Stop as stop:
                return stop

    return asyncio.run(run()), sends


def test_the_fetcher_tries_as_often_as_the_policy_says() -> None:
    retry = _RecordingPolicy(retries=3)
    failures = [_Transient("status 503", 1.5, 503) for _ in range(10)]
    outcome, sends = _run_get(retry, failures)
    assert sends == 4
    assert isinstance(outcome, _Stop) and outcome.outcome is FetchOutcome.HTTP_ERROR
    assert outcome.status == 503 and "after 4 tries" in outcome.detail
    # the policy is asked with the next try's number and the server's Retry-After; tenacity
    # 9 works out the wait before its stop check, so it may ask once more after the last
    # try (and then stops without waiting)
    assert retry.asked[:3] == [(2, 1.5), (3, 1.5), (4, 1.5)]
    assert len(retry.asked) <= 4


def test_the_fetcher_stops_retrying_once_a_try_succeeds() -> None:
    retry = _RecordingPolicy(retries=2)
    outcome, sends = _run_get(retry, [_Transient("connect: reset")])
    assert outcome == "done" and sends == 2
    assert retry.asked == [(2, 0.0)]


def test_no_retries_means_one_try() -> None:
    outcome, sends = _run_get(_RecordingPolicy(retries=0), [_Transient("connect: reset")])
    assert sends == 1
    assert isinstance(outcome, _Stop) and outcome.outcome is FetchOutcome.CONNECT_ERROR
