"""Geostatistical risk smoothing: risk semivariogram and Poisson kriging (area-to-area, area-to-point)."""

from ._discretize import AreaPoints, discretize_areas
from ._kriging import (
    PoissonKrigingResult,
    RiskSurface,
    ordinary_kriging,
    poisson_kriging,
)
from ._plots import risk_surface_map, variogram_plot
from ._validation import SmootherValidation, cross_validate_smoothers
from ._variogram import RiskVariogram, VariogramModel, risk_variogram

__all__ = [
    "AreaPoints", "discretize_areas", "RiskVariogram", "VariogramModel", "risk_variogram",
    "PoissonKrigingResult", "RiskSurface", "poisson_kriging", "ordinary_kriging",
    "variogram_plot", "risk_surface_map", "SmootherValidation", "cross_validate_smoothers",
]
