"""Parameter checks shared by the public functions.

All messages follow one pattern::

    The 'alpha' parameter of local_clusters must be in (0, 1). Got 1.5 instead.
"""

from __future__ import annotations

import math
from collections.abc import Collection

from .errors import ParameterError


def _fail(name: str, func: str, requirement: str, value: object) -> ParameterError:
    return ParameterError(
        f"The '{name}' parameter of {func} must be {requirement}. Got {value!r} instead."
    )


def check_interval(
    value: float,
    name: str,
    func: str,
    *,
    low: float = -math.inf,
    high: float = math.inf,
    closed: str = "neither",
) -> float:
    """Check ``low < value < high`` (ends included per ``closed``: 'neither', 'left', 'right', 'both')."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise _fail(name, func, "a number", value) from None
    left = x >= low if closed in ("left", "both") else x > low
    right = x <= high if closed in ("right", "both") else x < high
    if math.isnan(x) or not (left and right):
        lb = "[" if closed in ("left", "both") else "("
        rb = "]" if closed in ("right", "both") else ")"
        raise _fail(name, func, f"in {lb}{low:g}, {high:g}{rb}", value)
    return x


def check_positive_int(value: int, name: str, func: str, *, minimum: int = 1) -> int:
    """Check that ``value`` is an integer >= ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, int | float) or int(value) != value:
        raise _fail(name, func, f"an integer >= {minimum}", value)
    if value < minimum:
        raise _fail(name, func, f"an integer >= {minimum}", value)
    return int(value)


def check_choice(value: object, name: str, func: str, choices: Collection[object]) -> object:
    """Check that ``value`` is one of ``choices``."""
    if value not in choices:
        opts = ", ".join(repr(c) for c in choices)
        raise _fail(name, func, f"one of {opts}", value)
    return value
