"""Exceptions and warnings raised by areamap.

Every user-facing problem is an :class:`AreamapError`. The command-line tool
prints the message of such an error (never a traceback) and exits with code 2.
Messages name the thing (file, column, parameter), the bad value(s) and the
fix, for example::

    Column 'cases' in cases.csv has 3 negative counts (rows 14, 88, 203).
    Counts must be whole numbers >= 0.

Warnings all derive from :class:`AreamapWarning` so a caller can filter them
in one place.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = [
    "AreamapError",
    "InputError",
    "ConfigError",
    "ParameterError",
    "GraphError",
    "ModelError",
    "ArchiveError",
    "AreamapWarning",
    "DataWarning",
    "GeometryRepairedWarning",
    "SmallNumbersWarning",
    "ModelWarning",
    "format_examples",
]


class AreamapError(Exception):
    """Base class of every error areamap raises on purpose."""


class InputError(AreamapError, ValueError):
    """An input file or table is unusable (missing ids, bad counts, bad geometry...)."""


class ConfigError(InputError):
    """The run configuration is invalid (unknown key, wrong type, missing file)."""


class ParameterError(AreamapError, ValueError):
    """A function argument is out of its valid range or of the wrong kind."""


class GraphError(InputError):
    """A neighbour graph does not fit the data (ids differ, asymmetric links...)."""


class ModelError(AreamapError, RuntimeError):
    """A model cannot be fitted to these data (all-zero counts, no convergence...)."""


class ArchiveError(AreamapError, RuntimeError):
    """The history archive is locked, corrupt or from an incompatible version."""


class AreamapWarning(UserWarning):
    """Base class of every warning areamap issues."""


class DataWarning(AreamapWarning):
    """Something in the data was handled automatically but deserves attention."""


class GeometryRepairedWarning(DataWarning):
    """Invalid geometries were repaired (for example by ``make_valid``)."""


class SmallNumbersWarning(DataWarning):
    """Counts or expected counts are small enough that ratios are unstable."""


class ModelWarning(AreamapWarning):
    """A model fitted, but a diagnostic suggests caution (edge of design, slow convergence)."""


def format_examples(values: Iterable[object], *, limit: int = 5) -> str:
    """Return the first few values joined by commas, plus how many more there are.

    Parameters
    ----------
    values : iterable
        Offending ids, rows or values.
    limit : int, default=5
        How many to show.

    Examples
    --------
    >>> format_examples([3, 9, 14, 88, 203, 250, 301])
    '3, 9, 14, 88, 203 and 2 more'
    >>> format_examples(["A01"])
    'A01'
    """
    items = [str(v) for v in values]
    # cap each shown value: a 200,000-character id must not flood a message
    shown = ", ".join(v if len(v) <= 80 else v[:79] + "…" for v in items[:limit])
    extra = len(items) - limit
    return f"{shown} and {extra} more" if extra > 0 else shown
