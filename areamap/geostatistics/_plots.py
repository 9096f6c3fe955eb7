"""Figures for the risk semivariogram and the kriged risk surface (``ax=`` convention)."""

from __future__ import annotations

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colors import ListedColormap, TwoSlopeNorm

from .._classify import palette_colours
from .._params import check_choice
from ..errors import InputError
from ._kriging import PoissonKrigingResult, RiskSurface
from ._variogram import RiskVariogram

__all__ = ["variogram_plot", "risk_surface_map"]

_POINTS = "#0072B2"   # Okabe-Ito blue: experimental values
_CURVE = "#D55E00"    # Okabe-Ito vermillion: fitted model, distinct from the points for colour-blind readers
_UNUSED = "#999999"


def _ax(ax):
    if ax is None:
        import matplotlib.pyplot as plt
        _, ax = plt.subplots(figsize=(6.5, 4.5))
    return ax


def variogram_plot(variogram: RiskVariogram, *, ax: Axes | None = None, title: str | None = None) -> Axes:
    """Experimental risk semivariogram (marker area by pair count) with the fitted model.

    Classes left out of the fit (too few pairs) are drawn as grey open circles;
    a dotted line marks the a priori risk variance.

    Parameters
    ----------
    variogram : RiskVariogram
    ax : matplotlib Axes, optional
    title : str, optional

    Returns
    -------
    matplotlib.axes.Axes
    """
    if not isinstance(variogram, RiskVariogram):
        raise InputError("variogram_plot needs a RiskVariogram from risk_variogram(); "
                         f"got {type(variogram).__name__}.")
    ax = _ax(ax)
    lags = variogram.lags
    used = lags["used"].to_numpy()
    size = 20 + 180 * lags["pairs"].to_numpy() / max(lags["pairs"].max(), 1)
    ax.scatter(lags["distance"][used], lags["semivariance"][used], s=size[used], color=_POINTS, alpha=0.8,
               label="experimental (area = pairs)", gid="experimental", zorder=3)
    if (~used).any():
        ax.scatter(lags["distance"][~used], lags["semivariance"][~used], s=size[~used], facecolors="none",
                   edgecolors=_UNUSED, label="too few pairs (not fitted)", gid="unused", zorder=3)
    h = np.linspace(0.0, variogram.max_distance, 200)[1:]
    ax.plot(np.r_[0.0, h], np.r_[variogram.fitted.nugget, variogram.fitted.semivariance(h)], color=_CURVE,
            lw=2, label=variogram.fitted.describe().split(":")[0], gid="model")
    ax.axhline(variogram.risk_variance, color="#555555", ls=":", lw=1, label="a priori risk variance",
               gid="variance")
    ax.axhline(0.0, color="#BBBBBB", lw=0.6)
    ax.set_xlim(0, variogram.max_distance)
    ax.set_xlabel("distance between area centres")
    ax.set_ylabel("semivariance of relative risk\n(Poisson noise removed)")
    ax.set_title(title or "Risk semivariogram")
    ax.legend(fontsize=8, frameon=False)
    if not variogram.spatial_structure:
        ax.text(0.5, 0.05, "no clear spatial structure", transform=ax.transAxes, ha="center", fontsize=9,
                color="#555555")
    return ax


def risk_surface_map(
    surface,
    areas,
    *,
    quantity: str = "relative_risk",
    ax: Axes | None = None,
    title: str | None = None,
) -> Axes:
    """Kriged risk surface as an image with the district boundaries over it.

    Parameters
    ----------
    surface : RiskSurface or PoissonKrigingResult (with a surface)
    areas : GeoDataFrame or GeoSeries
        Boundaries to draw.
    quantity : {"relative_risk", "sd"}, default="relative_risk"
        Relative risk on the project's diverging palette centred at 1 on a log
        scale (blue below, orange above), or the kriging standard deviation on
        the sequential palette.
    ax : matplotlib Axes, optional
    title : str, optional

    Returns
    -------
    matplotlib.axes.Axes
    """
    if isinstance(surface, PoissonKrigingResult):
        if surface.surface is None:
            raise InputError("risk_surface_map: this kriging result has no surface; rerun poisson_kriging "
                             "with surface_shape=(ny, nx).")
        surface = surface.surface
    if not isinstance(surface, RiskSurface):
        raise InputError(f"risk_surface_map needs a RiskSurface; got {type(surface).__name__}.")
    check_choice(quantity, "quantity", "risk_surface_map", ("relative_risk", "sd"))
    ax = _ax(ax)
    xmin, ymin, xmax, ymax = surface.bounds
    if quantity == "relative_risk":
        vals = np.log(np.clip(surface.relative_risk, 1e-6, None))
        lim = float(np.nanmax(np.abs(vals))) if np.isfinite(vals).any() else 1.0
        lim = max(lim, 1e-3)
        cmap = ListedColormap(palette_colours("diverging", 256))
        im = ax.imshow(vals, extent=(xmin, xmax, ymin, ymax), origin="upper", cmap=cmap,
                       norm=TwoSlopeNorm(0.0, -lim, lim), interpolation="nearest")
        cb = ax.figure.colorbar(im, ax=ax, shrink=0.8)
        ticks = np.log(np.array([0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0]))
        ticks = ticks[np.abs(ticks) <= lim]
        cb.set_ticks(ticks, labels=[f"{np.exp(t):.2g}" for t in ticks])
        cb.set_label("kriged relative risk")
    else:
        cmap = ListedColormap(palette_colours("sequential", 256))
        im = ax.imshow(np.sqrt(surface.variance), extent=(xmin, xmax, ymin, ymax), origin="upper", cmap=cmap,
                       interpolation="nearest")
        ax.figure.colorbar(im, ax=ax, shrink=0.8).set_label("kriging standard deviation (relative risk)")
    im.set_gid("surface")
    areas.geometry.boundary.plot(ax=ax, color="#333333", linewidth=0.4, gid="boundaries")
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(ymin, ymax)
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(title or ("Kriged relative risk (area-to-point Poisson kriging)" if quantity == "relative_risk"
                           else "Kriging standard deviation"))
    return ax
