"""The sandboxed fetcher: pulls only text, within strict limits, never into private or
special-purpose address space. See docs/fetching.md."""

from cascade.fetch.address_guard import AddressDecision, AddressGuard
from cascade.fetch.fetcher import Fetcher, SyncFetcher
from cascade.fetch.outcomes import FetchOutcome, FetchResult, Hop
from cascade.fetch.policy import FetchPolicy
from cascade.fetch.resolver import (
    ResolutionError,
    Resolver,
    StaticResolver,
    SystemResolver,
    parse_resolve_overrides,
)
from cascade.fetch.retry import RetryPolicy

__all__ = [
    "AddressDecision",
    "AddressGuard",
    "FetchOutcome",
    "FetchPolicy",
    "FetchResult",
    "Fetcher",
    "Hop",
    "ResolutionError",
    "Resolver",
    "RetryPolicy",
    "StaticResolver",
    "SyncFetcher",
    "SystemResolver",
    "parse_resolve_overrides",
]
