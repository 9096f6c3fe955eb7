"""The weekly bulletin: analysis of a period, rendering, and publishing.

* :mod:`~areamap.bulletin.analysis` -- :func:`analyse_period` computes a period and writes nothing;
  flag rules and small-count suppression.
* :mod:`~areamap.bulletin.render` -- figures, the HTML page and the tables.
* :mod:`~areamap.bulletin.publish` -- the output folder, the archive transaction and :func:`run_bulletin`.
* :mod:`~areamap.bulletin.wording` -- the string catalogue (audience, translation, date format).
* :mod:`~areamap.bulletin.page_figures` -- the page's figures at display size, with alt texts.
"""

from .analysis import (
    AREA_COLUMNS,
    KRIGING_COLUMNS,
    FlagRules,
    PeriodAnalysis,
    analyse_period,
    file_sha256,
    flag_areas,
    suppress_counts,
)
from .publish import OUTPUT_FILES, BulletinResult, run_bulletin
from .render import render_bulletin

__all__ = [
    "AREA_COLUMNS",
    "KRIGING_COLUMNS",
    "OUTPUT_FILES",
    "BulletinResult",
    "FlagRules",
    "PeriodAnalysis",
    "analyse_period",
    "file_sha256",
    "flag_areas",
    "render_bulletin",
    "run_bulletin",
    "suppress_counts",
]
