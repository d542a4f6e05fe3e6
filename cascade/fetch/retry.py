"""``RetryPolicy``: when the fetcher tries a request again, and how long it waits first.

One frozen object with pure methods, so every rule can be checked without a server: which
statuses are transient, how a ``Retry-After`` header reads (RFC 9110 section 10.2.3), when
a ``Retry-After`` is too long to wait for, and the backoff before each new try. The fetcher
runs its retry loop with tenacity, driven by these methods, always inside the whole-fetch
deadline. Change a copy with ``dataclasses.replace(policy, retries=0)``.
"""

from __future__ import annotations

import email.utils
import time
from dataclasses import dataclass
from datetime import UTC

__all__ = ["DEFAULT_TRANSIENT_STATUSES", "RetryPolicy"]

# 429 Too Many Requests (RFC 6585 section 4); 502 Bad Gateway, 503 Service Unavailable,
# 504 Gateway Timeout (RFC 9110 sections 15.6.3 to 15.6.5)
DEFAULT_TRANSIENT_STATUSES = (429, 502, 503, 504)


@dataclass(frozen=True)
class RetryPolicy:
    """Retries for transient failures: connection resets and the ``transient_statuses``.

    ``retries`` extra tries after the first (``attempts`` is one more). The wait before try
    ``n`` is ``backoff_base_s * 2 ** (n - 2)``, at most ``backoff_cap_s``, or the server's
    ``Retry-After`` when that is longer. A ``Retry-After`` over ``max_retry_after_s`` is
    not waited for: the fetch gives up at once. Times in seconds.
    """

    retries: int = 2
    transient_statuses: tuple[int, ...] = DEFAULT_TRANSIENT_STATUSES
    backoff_base_s: float = 0.1
    backoff_cap_s: float = 2.0
    max_retry_after_s: float = 5.0

    def __post_init__(self) -> None:
        if isinstance(self.retries, bool) or not isinstance(self.retries, int) \
                or self.retries < 0:
            raise ValueError(f"RetryPolicy.retries must be a whole number, 0 or more, "
                             f"not {self.retries!r}")
        statuses = tuple(self.transient_statuses)
        bad = [s for s in statuses
               if isinstance(s, bool) or not isinstance(s, int) or not 400 <= s <= 599]
        if bad:
            raise ValueError(f"RetryPolicy.transient_statuses may hold only error statuses "
                             f"(400-599), not {bad}")
        object.__setattr__(self, "transient_statuses", statuses)
        for name in ("backoff_base_s", "backoff_cap_s", "max_retry_after_s"):
            value = getattr(self, name)
            if not isinstance(value, int | float) or not value >= 0:  # also refuses NaN
                raise ValueError(f"RetryPolicy.{name} must be a number of seconds, 0 or "
                                 f"more, not {value!r}")
        if self.backoff_cap_s < self.backoff_base_s:
            raise ValueError("RetryPolicy.backoff_cap_s must not be below backoff_base_s "
                             f"({self.backoff_cap_s} < {self.backoff_base_s})")

    @property
    def attempts(self) -> int:
        """Tries in all, the first one included."""
        return self.retries + 1

    def is_transient(self, status: int) -> bool:
        """Whether a response with this status is worth another try."""
        return status in self.transient_statuses

    def parse_retry_after(self, value: str | None, now: float | None = None) -> float | None:
        """Seconds to wait that a ``Retry-After`` header asks for; None if absent or unreadable.

        RFC 9110 section 10.2.3: either delay-seconds (digits) or an HTTP-date; a date in
        the past means no wait (0.0). ``now`` is POSIX time (default: the clock), so a test
        can fix it. Never raises on header text.
        """
        if not value:
            return None
        value = value.strip()
        if value.isascii() and value.isdigit():
            return float(value)
        try:
            when = email.utils.parsedate_to_datetime(value)
        except (TypeError, ValueError, OverflowError, IndexError):
            return None
        if when.tzinfo is None:
            # RFC 9110 section 5.6.7: an HTTP-date is UTC, the zone-less asctime form too
            when = when.replace(tzinfo=UTC)
        try:
            target = when.timestamp()
        except (OverflowError, ValueError, OSError):
            return None
        return max(0.0, target - (time.time() if now is None else now))

    def gives_up_on(self, retry_after_s: float | None) -> bool:
        """Whether a ``Retry-After`` of this many seconds is too long to wait for."""
        return retry_after_s is not None and retry_after_s > self.max_retry_after_s

    def wait_before(self, attempt_number: int, retry_after_s: float | None = None) -> float:
        """Seconds to wait before try ``attempt_number`` (1 is the first try: no wait).

        Exponential backoff from ``backoff_base_s``, capped at ``backoff_cap_s``; a longer
        ``retry_after_s`` from the server wins (check ``gives_up_on`` first).
        """
        if isinstance(attempt_number, bool) or not isinstance(attempt_number, int) \
                or attempt_number < 1:
            raise ValueError(f"attempt_number counts from 1, not {attempt_number!r}")
        if attempt_number == 1:
            return 0.0
        backoff = min(self.backoff_cap_s,
                      self.backoff_base_s * 2.0 ** min(attempt_number - 2, 64))
        return max(retry_after_s or 0.0, backoff)
