"""The exception tree: one root, a few typed branches, messages that say what to do.

A fetch that fails is not an exception (it is a ``FetchResult`` with an outcome code);
exceptions are for the caller's mistakes and for broken files.
"""

from __future__ import annotations

__all__ = [
    "CascadeError",
    "DataError",
    "InputFormatError",
    "InvalidURL",
    "ModelFileError",
    "NotFittedError",
    "StoreError",
    "TaxonomyError",
    "UsageError",
]


class CascadeError(Exception):
    """Root of every error cascade raises on purpose."""


class InvalidURL(CascadeError, ValueError):
    """The text is not a URL cascade can work with; ``reason`` says why."""

    def __init__(self, text: str, reason: str) -> None:
        self.text = text
        self.reason = reason
        shown = text if len(text) <= 120 else text[:117] + "..."
        super().__init__(f"invalid URL {shown!r}: {reason}")


class TaxonomyError(CascadeError, ValueError):
    """The category file is malformed, or labels fall outside it."""


class ModelFileError(CascadeError):
    """A model directory is missing, tampered with, truncated, foreign or of another version."""


class InputFormatError(CascadeError, ValueError):
    """An input file cannot be read as any of the supported formats."""


class NotFittedError(CascadeError, AttributeError):
    """An estimator was used before ``fit``."""


class UsageError(CascadeError, ValueError):
    """An option or argument is wrong (a value out of range, options that clash)."""


class DataError(CascadeError, ValueError):
    """The input is readable but cannot serve the request: no usable rows, labels the model
    does not know, too few rows to fit."""


class StoreError(CascadeError):
    """The verdict store file cannot be used: not a cascade store, another schema version,
    or a path that is not a ``.sqlite`` file."""
