"""What a fetch ended with: one ``FetchResult`` per URL, never an exception.

``outcome`` is one code of the closed set ``FetchOutcome``; anything but ``ok`` means the
page text is absent and the URL model's verdict stands, with the outcome kept as the reason.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

__all__ = ["FetchOutcome", "FetchResult", "Hop"]


class FetchOutcome(StrEnum):
    OK = "ok"
    BAD_URL = "bad-url"  # not a URL, userinfo present, scheme or port not allowed
    BLOCKED_ADDRESS = "blocked-address"  # every address of the host is refused by the guard
    DNS_ERROR = "dns-error"
    CONNECT_ERROR = "connect-error"  # refused, reset, unreachable
    TLS_ERROR = "tls-error"
    TIMEOUT = "timeout"  # the whole-fetch deadline passed
    QUEUE_TIMEOUT = "queue-timeout"  # waited too long in the fetcher's own queues; never sent
    TOO_MANY_REDIRECTS = "too-many-redirects"
    ROBOTS_DISALLOWED = "robots-disallowed"
    HTTP_ERROR = "http-error"  # a 4xx/5xx status after any retries
    NOT_TEXT = "not-text"  # content type not allowed, or binary bytes behind a text type
    TOO_LARGE = "too-large"  # over a byte cap (wire, decoded, or headers)
    BAD_RESPONSE = "bad-response"  # not HTTP, broken encoding, too many encoding layers


@dataclass(frozen=True)
class Hop:
    """One request of a fetch: the URL asked for, the address connected to, the answer."""

    url: str
    address: str | None
    status: int | None

    def to_dict(self) -> dict[str, Any]:
        return {"url": self.url, "address": self.address, "status": self.status}


@dataclass(frozen=True)
class FetchResult:
    url: str
    final_url: str
    outcome: FetchOutcome
    status: int | None = None
    content_type: str | None = None
    charset: str | None = None
    text: str | None = None
    bytes_read: int = 0  # every byte read off the socket for this fetch (all hops, headers)
    elapsed_ms: float = 0.0  # from the fetch's first connection step (queueing not counted)
    redirects: tuple[Hop, ...] = field(default_factory=tuple)
    detail: str = ""  # a human-readable reason ("10.0.0.1 is private use (RFC 1918)")
    queued_ms: float = 0.0  # time spent waiting for the fetcher's own concurrency and delay

    @property
    def ok(self) -> bool:
        return self.outcome is FetchOutcome.OK

    def to_dict(self, with_text: bool = True) -> dict[str, Any]:
        out = {
            "url": self.url,
            "final_url": self.final_url,
            "outcome": str(self.outcome),
            "status": self.status,
            "content_type": self.content_type,
            "charset": self.charset,
            "bytes_read": self.bytes_read,
            "elapsed_ms": round(self.elapsed_ms, 1),
            "queued_ms": round(self.queued_ms, 1),
            "redirects": [h.to_dict() for h in self.redirects],
            "detail": self.detail,
        }
        if with_text:
            out["text"] = self.text
        return out
