"""Declared parameter constraints, checked when an estimator is fitted or loaded.

Each estimator lists its constructor parameters in ``_parameter_constraints`` (name to a
constraint); ``check_params`` runs them all and raises ``ValueError`` naming the parameter,
the value and what was expected. scikit-learn does the same with a private module of its
own; a dozen lines here keep us off its private API.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["Constraint", "Interval", "OneOf", "PowerOfTwo", "Range", "check_params"]


class Constraint:
    """A test of one parameter value; ``describe`` says what is accepted."""

    def accepts(self, value: Any) -> bool:  # pragma: no cover - interface
        raise NotImplementedError

    def describe(self) -> str:  # pragma: no cover - interface
        raise NotImplementedError


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and \
        math.isfinite(value)


@dataclass(frozen=True)
class Interval(Constraint):
    """A real (or, with ``integer``, whole) number between ``low`` and ``high``; an end is
    open when ``closed`` says so ("both", "left", "right", "neither"); None is unbounded."""

    low: float | None
    high: float | None
    closed: str = "both"
    integer: bool = False
    allow_none: bool = False

    def accepts(self, value: Any) -> bool:
        if value is None:
            return self.allow_none
        if not _is_number(value) or (self.integer and int(value) != value):
            return False
        if self.integer and isinstance(value, float):
            return False
        left_ok = self.low is None or (value >= self.low if self.closed in ("both", "left")
                                       else value > self.low)
        right_ok = self.high is None or (value <= self.high if self.closed in ("both", "right")
                                         else value < self.high)
        return left_ok and right_ok

    def describe(self) -> str:
        kind = "a whole number" if self.integer else "a number"
        lo = "" if self.low is None else (f" >= {self.low}" if self.closed in ("both", "left")
                                          else f" > {self.low}")
        hi = "" if self.high is None else (f" <= {self.high}" if self.closed in ("both", "right")
                                           else f" < {self.high}")
        both = " and".join(x for x in (lo, hi) if x)
        return kind + both + (" (or None)" if self.allow_none else "")


@dataclass(frozen=True)
class PowerOfTwo(Constraint):
    """A power of two at least ``low`` (hashing spaces)."""

    low: int = 16

    def accepts(self, value: Any) -> bool:
        return isinstance(value, int) and not isinstance(value, bool) and value >= self.low \
            and value & (value - 1) == 0

    def describe(self) -> str:
        return f"a power of two >= {self.low}"


@dataclass(frozen=True)
class Range(Constraint):
    """A pair ``(low, high)`` of whole numbers with ``lowest <= low <= high <= highest``."""

    lowest: int
    highest: int

    def accepts(self, value: Any) -> bool:
        if not isinstance(value, tuple | list) or len(value) != 2:
            return False
        lo, hi = value
        return all(isinstance(v, int) and not isinstance(v, bool) for v in (lo, hi)) and \
            self.lowest <= lo <= hi <= self.highest

    def describe(self) -> str:
        return f"a pair (min, max) with {self.lowest} <= min <= max <= {self.highest}"


@dataclass(frozen=True)
class OneOf(Constraint):
    """One of a few values (or a test the value must pass, e.g. a dict check)."""

    options: tuple[Any, ...] = ()
    test: Callable[[Any], bool] | None = None
    text: str = ""

    def accepts(self, value: Any) -> bool:
        if self.test is not None and self.test(value):
            return True
        return any(value is o or (type(value) is type(o) and value == o) for o in self.options)

    def describe(self) -> str:
        return self.text or "one of " + ", ".join(repr(o) for o in self.options)


def check_params(owner: Any, constraints: Mapping[str, Constraint]) -> None:
    """Raise ``ValueError`` for the first parameter of ``owner`` that breaks its constraint."""
    name = type(owner).__name__
    for param, constraint in constraints.items():
        value = getattr(owner, param)
        if not constraint.accepts(value):
            raise ValueError(f"{name}.{param} must be {constraint.describe()}, got {value!r}")
