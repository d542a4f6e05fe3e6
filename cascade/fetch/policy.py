"""``FetchPolicy``: every limit of the sandboxed fetcher, in one frozen object.

Change a copy with ``dataclasses.replace(policy, deadline_s=5.0)``. docs/fetching.md says
why each default is what it is.
"""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass, field

from cascade.fetch.retry import RetryPolicy

__all__ = ["DEFAULT_CONTENT_TYPES", "FetchPolicy"]

DEFAULT_CONTENT_TYPES = ("text/html", "application/xhtml+xml", "text/plain")


@dataclass(frozen=True)
class FetchPolicy:
    """Limits for one fetcher. Sizes in bytes, times in seconds."""

    schemes: tuple[str, ...] = ("http", "https")
    ports: tuple[int, ...] = (80, 443)
    max_redirects: int = 5
    deadline_s: float = 10.0  # one fetch from its first connection: DNS, robots, hops, body
    connect_timeout_s: float = 5.0
    max_queue_s: float = 60.0  # waiting in the fetcher's own queues, before the deadline runs
    max_bytes: int = 2 << 20  # bytes read off the socket per fetch: heads, 1xx, body, framing
    max_decoded_bytes: int = 4 << 20  # bytes after Content-Encoding is undone
    max_encoding_layers: int = 2  # e.g. "gzip" is 1; "gzip, br" is 2
    max_header_bytes: int = 32 << 10  # bytes read per hop before the final header block ends
    max_body_chunks: int = 8192  # pieces of one body: tiny chunks cost CPU, not bytes
    # the kernel's receive queue of one connection (SO_RCVBUF, which Linux doubles): what a
    # server can push beyond a cap before the fetcher hangs up, and kernel memory per fetch
    receive_buffer_bytes: int = 128 << 10
    content_types: tuple[str, ...] = DEFAULT_CONTENT_TYPES
    user_agent: str = "cascade-fetcher/0.1 (URL categorization; operator not configured)"
    obey_robots: bool = True
    robots_max_bytes: int = 500 << 10  # RFC 9309 section 2.5: parse at least 500 KiB
    robots_cache_s: float = 24 * 3600.0  # RFC 9309 section 2.4: no longer than 24 hours
    robots_failure_cache_s: float = 60.0  # a 5xx robots.txt; timeouts are never cached
    robots_parse_timeout_s: float = 2.0  # parsing runs in a worker thread, within this
    robots_cache_bytes: int = 64 << 20  # estimated memory of all cached parsed rules
    per_host_concurrency: int = 2
    per_host_delay_s: float = 0.5  # least time between two requests to one host
    concurrency: int = 64  # fetches in flight at once, all hosts together
    retry: RetryPolicy = RetryPolicy()  # transient failures: how often, how long to wait
    allow_networks: tuple[ipaddress.IPv4Network | ipaddress.IPv6Network, ...] = field(
        default=())  # holes in the address guard: explicit, empty by default
    allow_wide_networks: bool = False  # a hole wider than /24 (IPv4) or /48 (IPv6)

    def __post_init__(self) -> None:
        for name in ("deadline_s", "connect_timeout_s", "max_queue_s",
                     "robots_parse_timeout_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"FetchPolicy.{name} must be positive")
        for name in ("per_host_delay_s", "robots_cache_s", "robots_failure_cache_s"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"FetchPolicy.{name} must not be negative")
        for name in ("max_bytes", "max_decoded_bytes", "max_header_bytes", "max_body_chunks",
                     "receive_buffer_bytes", "concurrency",
                     "per_host_concurrency", "robots_max_bytes", "robots_cache_bytes"):
            if getattr(self, name) < 1:
                raise ValueError(f"FetchPolicy.{name} must be at least 1")
        if self.max_redirects < 0 or self.max_encoding_layers < 0:
            raise ValueError("FetchPolicy.max_redirects and max_encoding_layers "
                             "must not be negative")
        if not isinstance(self.retry, RetryPolicy):
            raise ValueError("FetchPolicy.retry must be a RetryPolicy, e.g. "
                             f"RetryPolicy(retries=1), not {type(self.retry).__name__}")
        bad = [s for s in self.schemes if s not in ("http", "https")]
        if bad:
            raise ValueError(f"FetchPolicy.schemes may hold only http and https, not {bad}")
        if any(not 0 < p < 65536 for p in self.ports):
            raise ValueError("FetchPolicy.ports must be TCP ports (1-65535)")
        networks = tuple(ipaddress.ip_network(n) for n in self.allow_networks)
        object.__setattr__(self, "allow_networks", networks)
        wide = [str(n) for n in networks if _too_wide(n)]
        if wide and not self.allow_wide_networks:
            raise ValueError(
                f"allow_networks {wide} would open the address guard to a wide global block "
                "(wider than /24 for IPv4 or /48 for IPv6); open only the test server's own "
                "address, or set allow_wide_networks (--dangerously-allow-wide-networks) if "
                "you really mean it")
        if any(ord(c) < 32 or ord(c) == 127 for c in self.user_agent):
            raise ValueError("FetchPolicy.user_agent must not hold control characters")

    def with_operator(self, contact: str) -> FetchPolicy:
        """A copy whose user agent names the operator (a URL or mail address to reach).
        Raises ``ValueError`` for an empty contact or one with control characters (a CR or
        LF would break the request's header block)."""
        from dataclasses import replace

        contact = contact.strip()
        if not contact or any(ord(c) < 32 or ord(c) == 127 for c in contact):
            raise ValueError("--operator must be a URL or mail address on one line, without "
                             "control characters")
        return replace(self, user_agent=f"cascade-fetcher/0.1 (URL categorization; {contact})")


def _too_wide(network: ipaddress.IPv4Network | ipaddress.IPv6Network) -> bool:
    """A hole that reaches many hosts outside special-purpose space: a global block wider
    than /24 (IPv4) or /48 (IPv6), or a block containing the whole of one of those."""
    limit = 24 if network.version == 4 else 48
    if network.prefixlen >= limit:
        return False
    return network.is_global or network.prefixlen == 0 or not network.is_private
