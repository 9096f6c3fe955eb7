"""areamap: disease mapping for area-aggregated case counts.

Results are analytic aids, not public-health directives: decisions rest with
the responsible health authority and local rules.
"""

from .errors import (
    AreamapError,
    AreamapWarning,
    ArchiveError,
    ConfigError,
    DataWarning,
    GeometryRepairedWarning,
    GraphError,
    InputError,
    ModelError,
    ModelWarning,
    ParameterError,
    SmallNumbersWarning,
)
from .graphs import AreaGraph, GraphSummary

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "AreamapError",
    "AreamapWarning",
    "ArchiveError",
    "ConfigError",
    "DataWarning",
    "GeometryRepairedWarning",
    "GraphError",
    "InputError",
    "ModelError",
    "ModelWarning",
    "ParameterError",
    "SmallNumbersWarning",
    "AreaGraph",
    "GraphSummary",
]
