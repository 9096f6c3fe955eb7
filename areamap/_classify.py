"""Classification of per-area values into map classes, and class colours (private; re-exported by :mod:`areamap.maps`).

All classes are *right-closed*: class ``c`` holds the values ``v`` with
``edges[c] < v <= edges[c + 1]``; the first class also holds its lower edge.
The cut points between classes are ``breaks`` (``k - 1`` numbers).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.colors import to_rgba

from ._params import check_choice, check_positive_int
from .errors import DataWarning, InputError, ParameterError, format_examples

__all__ = [
    "Classification",
    "classify",
    "natural_breaks",
    "relative_risk_breaks",
    "SCHEMES",
    "DEFAULT_RISK_STEPS",
    "palette_colours",
    "class_colours",
    "bivariate_colours",
]

#: Names accepted by ``classify(scheme=...)``.
SCHEMES = ("quantiles", "equal_intervals", "natural_breaks", "relative_risk", "user")

#: Upper cut points of the default relative-risk classes; the lower ones are their reciprocals.
DEFAULT_RISK_STEPS = (1.1, 1.25, 1.5, 2.0)

#: Default cap on distinct values used by the natural-breaks search (see :func:`natural_breaks`).
DEFAULT_MAX_VALUES = 3000


@dataclass(frozen=True, eq=False)
class Classification:
    """Map classes for a set of per-area values.

    Attributes
    ----------
    scheme : str
        How the cut points were found (one of :data:`SCHEMES`).
    breaks : tuple of float
        The ``k - 1`` cut points between classes, increasing. Passing them back
        with ``scheme="user"`` reproduces the same classes.
    edges : tuple of float
        ``k + 1`` class edges: the lowest value (or ``-inf`` / ``0`` for fixed
        schemes), the breaks, and the highest value (or ``inf``).
    labels : tuple of str
        Readable range of each class (``"0.80 – 0.91"``, ``"> 2.00"``).
    counts : tuple of int
        Number of areas in each class (missing values are not counted).
    class_index : numpy.ndarray of int, shape (n,)
        Class of each area, ``-1`` for missing values, in input order.
    index : pandas.Index or None
        Index of the input when it was a Series.
    n_missing : int
        Areas with a missing (NaN) value.
    variance_fit : float
        ``1 - (within-class sum of squares) / (total sum of squares)`` over the
        non-missing values; 1 means classes separate the values perfectly.
    notes : tuple of str
        Things worth knowing (classes merged because of ties, values sampled...).
    """

    scheme: str
    breaks: tuple[float, ...]
    edges: tuple[float, ...]
    labels: tuple[str, ...]
    counts: tuple[int, ...]
    class_index: np.ndarray = field(repr=False)
    index: pd.Index | None = field(default=None, repr=False)
    n_missing: int = 0
    variance_fit: float = float("nan")
    notes: tuple[str, ...] = ()

    @property
    def k(self) -> int:
        """Number of classes."""
        return len(self.labels)

    def to_frame(self, kind: str = "classes") -> pd.DataFrame:
        """Table of the classes or of the areas.

        Parameters
        ----------
        kind : {"classes", "areas"}, default="classes"
            ``"classes"``: one row per class with columns ``label``, ``lower``,
            ``upper``, ``count``. ``"areas"``: one row per area (input index)
            with columns ``class_index`` and ``class_label`` (missing: -1 and NA).
        """
        check_choice(kind, "kind", "Classification.to_frame", ("classes", "areas"))
        if kind == "classes":
            return pd.DataFrame(
                {
                    "label": list(self.labels),
                    "lower": list(self.edges[:-1]),
                    "upper": list(self.edges[1:]),
                    "count": list(self.counts),
                },
                index=pd.RangeIndex(self.k, name="class"),
            )
        lab = np.array(list(self.labels) + [None], dtype=object)
        idx = self.index if self.index is not None else pd.RangeIndex(self.class_index.size)
        return pd.DataFrame(
            {"class_index": self.class_index, "class_label": lab[self.class_index]}, index=idx
        )

    def summary(self) -> str:
        """Readable description: scheme, classes with counts, missing values, fit."""
        lines = [f"{self.k} classes by {self.scheme.replace('_', ' ')} "
                 f"(right-closed: each class holds values above its lower edge up to its upper edge)"]
        width = max(len(s) for s in self.labels)
        lines += [f"  {lab:<{width}}  {n:>6} area{'' if n == 1 else 's'}"
                  for lab, n in zip(self.labels, self.counts)]
        if self.n_missing:
            lines.append(f"  {'missing':<{width}}  {self.n_missing:>6} area{'' if self.n_missing == 1 else 's'}")
        if math.isfinite(self.variance_fit):
            lines.append(f"Share of variance between classes: {self.variance_fit:.3f}")
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return f"<p>{self.summary().splitlines()[0]}</p>" + self.to_frame().to_html()


# --------------------------------------------------------------------------- helpers
def _as_values(values, func: str) -> tuple[np.ndarray, pd.Index | None]:
    index = values.index if isinstance(values, pd.Series) else None
    try:
        x = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise InputError(
            f"The values given to {func} must be numbers (NaN marks a missing value). "
            f"Got {format_examples(list(np.asarray(values, dtype=object).ravel()[:5]))}."
        ) from None
    if x.ndim != 1:
        raise InputError(f"The values given to {func} must be one-dimensional; got shape {x.shape}.")
    bad = np.flatnonzero(np.isinf(x))
    if bad.size:
        where = list(index[bad]) if index is not None else list(bad)
        raise InputError(
            f"{bad.size} value(s) given to {func} are infinite (at {format_examples(where)}). "
            "Replace them with a finite number or NaN (missing)."
        )
    return x, index


def relative_risk_breaks(steps: Sequence[float] = DEFAULT_RISK_STEPS) -> tuple[float, ...]:
    """Cut points for ratios, symmetric around 1 on the log scale.

    Parameters
    ----------
    steps : sequence of float, default=(1.1, 1.25, 1.5, 2.0)
        Cut points above 1 (each > 1); the cut points below 1 are their reciprocals.

    Returns
    -------
    tuple of float
        ``1/steps[-1], ..., 1/steps[0], steps[0], ..., steps[-1]``; with the
        default steps: 0.5, 0.667, 0.8, 0.909, 1.1, 1.25, 1.5, 2 (nine classes,
        the middle one 0.909–1.1 around "as expected").

    Notes
    -----
    A ratio of 2 and a ratio of 1/2 are equally far from 1 on the log scale, so
    the classes above and below 1 have the same widths of ``log(ratio)``.

    Examples
    --------
    >>> [round(b, 3) for b in relative_risk_breaks((1.5, 2))]
    [0.5, 0.667, 1.5, 2.0]
    """
    s = np.asarray(steps, dtype=float)
    if s.ndim != 1 or s.size == 0 or not np.all(s > 1) or np.any(np.diff(s) <= 0):
        raise ParameterError(
            "The 'steps' parameter of relative_risk_breaks must be increasing numbers "
            f"> 1. Got {list(steps)!r} instead."
        )
    return tuple(float(v) for v in np.concatenate([1.0 / s[::-1], s]))


def _format_edges(edges: np.ndarray) -> list[str]:
    """Shortest fixed-decimal text that keeps edges distinct and within 1% of their value."""
    fin = edges[np.isfinite(edges)]
    if fin.size == 0:
        return [str(e) for e in edges]
    span = float(fin.max() - fin.min()) or max(abs(float(fin.max())), 1.0)
    for d in range(0, 7):
        txt = [f"{v:.{d}f}" for v in fin]
        err = np.abs(np.array([float(t) for t in txt]) - fin)
        ok = np.all((err <= 0.01 * np.abs(fin)) | (err <= 0.0005 * span))
        if ok and len(set(txt)) == len(set(fin.tolist())):
            break
    out = []
    for e in edges:
        out.append(f"{e:.{d}f}" if math.isfinite(e) else ("-inf" if e < 0 else "inf"))
    return out


def _labels(edges: np.ndarray, open_low: bool, open_high: bool) -> tuple[str, ...]:
    txt = _format_edges(edges)
    k = edges.size - 1
    labs = []
    for c in range(k):
        if c == 0 and open_low:
            labs.append(f"≤ {txt[1]}" if k > 1 else "all values")
        elif c == k - 1 and open_high:
            labs.append(f"> {txt[c]}")
        else:
            labs.append(f"{txt[c]} – {txt[c + 1]}")
    return tuple(labs)


def _ssq_split(v: np.ndarray, cls: np.ndarray, k: int) -> float:
    total = float(((v - v.mean()) ** 2).sum()) if v.size else 0.0
    if total <= 0:
        return float("nan")
    n = np.bincount(cls, minlength=k).astype(float)
    s = np.bincount(cls, weights=v, minlength=k)
    means = np.divide(s, n, out=np.zeros(k), where=n > 0)
    within = float(((v - means[cls]) ** 2).sum())
    return 1.0 - within / total


# ------------------------------------------------------------------- natural breaks
def _fisher_jenks_sorted(x: np.ndarray, w: np.ndarray, k: int) -> np.ndarray:
    """Optimal partition of sorted distinct ``x`` (weights ``w``) into ``k`` runs.

    Returns the index of the last element of each of the first ``k - 1`` classes.
    Dynamic programming over prefix sums; the loop runs over the end point ``j``
    and is vectorised over the start of the last class and the number of classes.
    """
    n = x.size
    xc = x - np.average(x, weights=w)  # centring limits cancellation in S2 - S1^2/W
    cw = np.concatenate([[0.0], np.cumsum(w)])
    c1 = np.concatenate([[0.0], np.cumsum(w * xc)])
    c2 = np.concatenate([[0.0], np.cumsum(w * xc * xc)])
    cost = np.full((k, n), np.inf)
    start = np.zeros((k, n), dtype=np.int64)
    cost[0] = c2[1:] - c1[1:] ** 2 / cw[1:]
    rows = np.arange(k - 1)
    for j in range(1, n):
        i = np.arange(1, j + 1)  # first element of the last class
        ssd = c2[j + 1] - c2[i] - (c1[j + 1] - c1[i]) ** 2 / (cw[j + 1] - cw[i])
        cand = cost[: k - 1, i - 1] + ssd
        best = np.argmin(cand, axis=1)
        cost[1:, j] = cand[rows, best]
        start[1:, j] = i[best]
    ends = []
    end = n - 1
    for c in range(k - 1, 0, -1):
        s = start[c, end]
        ends.append(s - 1)
        end = s - 1
    return np.array(ends[::-1], dtype=np.int64)


def natural_breaks(
    values, k: int = 5, *, max_values: int = DEFAULT_MAX_VALUES
) -> tuple[tuple[float, ...], str | None]:
    """Fisher–Jenks cut points: the ``k`` classes with least within-class sum of squares.

    Parameters
    ----------
    values : array-like of float
        Finite values (NaN are ignored).
    k : int, default=5
        Number of classes (reduced to the number of distinct values if smaller).
    max_values : int, default=3000
        Cap on the distinct values searched. Above it the search runs on
        ``max_values`` evenly spaced order statistics of the sorted values
        (deterministic) and the breaks are approximate.

    Returns
    -------
    breaks : tuple of float
        The ``k - 1`` cut points (each the largest value of its class).
    note : str or None
        Set when values were sampled.

    Notes
    -----
    Sort the values ``x_(1) <= ... <= x_(n)``. Fisher (1958) showed the optimal
    grouping of ordered values is into contiguous runs, so with
    ``SS(i, j) = sum_{t=i..j} (x_t - mean_{i..j})^2`` the least total within-class
    sum of squares with ``c`` classes ending at ``j`` obeys

    ``D(c, j) = min_{c <= i <= j} D(c-1, i-1) + SS(i, j)``,  ``D(1, j) = SS(1, j)``,

    computed from prefix sums in ``O(k n^2)`` operations. Repeated values are
    searched once with their count as weight, which gives the same optimum
    (Jenks 1977 applies the criterion to map classes).

    References
    ----------
    Fisher, W. D. (1958). On grouping for maximum homogeneity. JASA 53, 789–798.
    Jenks, G. F. (1977). Optimal data classification for choropleth maps.
    Occasional paper 2, Department of Geography, University of Kansas.

    Examples
    --------
    >>> natural_breaks([1, 2, 3, 10, 11, 12, 30], 3)[0]
    (3.0, 12.0)
    """
    k = check_positive_int(k, "k", "natural_breaks")
    max_values = check_positive_int(max_values, "max_values", "natural_breaks", minimum=10)
    x = np.asarray(values, dtype=float)
    x = np.sort(x[~np.isnan(x)])
    note = None
    if x.size == 0:
        return (), None
    uniq, counts = np.unique(x, return_counts=True)
    if uniq.size > max_values:
        pos = np.round(np.linspace(0, x.size - 1, max_values)).astype(np.int64)
        uniq, counts = np.unique(x[pos], return_counts=True)
        note = (f"natural breaks searched on {max_values} evenly spaced order statistics of "
                f"{x.size} values ({np.unique(x).size} distinct); breaks are approximate")
    k = min(k, uniq.size)
    if k <= 1:
        return (), note
    ends = _fisher_jenks_sorted(uniq, counts.astype(float), k)
    return tuple(float(uniq[e]) for e in ends), note


# ------------------------------------------------------------------------- classify
def classify(
    values,
    *,
    scheme: str = "quantiles",
    k: int = 5,
    breaks: Sequence[float] | None = None,
    max_values: int = DEFAULT_MAX_VALUES,
) -> Classification:
    """Group per-area values into map classes.

    Parameters
    ----------
    values : array-like or pandas.Series of float, shape (n,)
        One value per area; NaN marks a missing value (class ``-1``).
    scheme : {"quantiles", "equal_intervals", "natural_breaks", "relative_risk", "user"}, default="quantiles"
        ``"quantiles"``: cut points at the ``1/k, ..., (k-1)/k`` quantiles
        (numpy's default linear interpolation); classes hold about equal numbers
        of areas. ``"equal_intervals"``: ``k`` classes of equal width between the
        lowest and highest value. ``"natural_breaks"``: Fisher–Jenks (least
        within-class sum of squares, see :func:`natural_breaks`).
        ``"relative_risk"``: fixed cut points for ratios, symmetric around 1 on
        the log scale (``breaks`` if given, else :func:`relative_risk_breaks`);
        ``k`` is ignored. ``"user"``: the cut points in ``breaks``.
    k : int, default=5
        Number of classes for the data-driven schemes. Fewer classes result
        when ties make cut points coincide (a :class:`DataWarning` says so).
    breaks : sequence of float, optional
        Increasing cut points for ``"user"`` / ``"relative_risk"``. Classes are
        open at both ends: ``len(breaks) + 1`` classes, empty ones included, so
        two maps with the same breaks share classes.
    max_values : int, default=3000
        Cap on distinct values searched by natural breaks.

    Returns
    -------
    Classification

    Notes
    -----
    Classes are right-closed: a value equal to a cut point belongs to the class
    below it. Quantile classes of skewed data put very different values
    together; equal intervals can leave classes nearly empty. For ratios, fixed
    breaks around 1 are the only scheme whose colours mean the same thing from
    week to week.

    Examples
    --------
    >>> c = classify([0.5, 0.95, 1.0, 1.3, 2.5], scheme="relative_risk", breaks=[0.8, 1.25])
    >>> c.labels
    ('≤ 0.80', '0.80 – 1.25', '> 1.25')
    >>> c.counts
    (1, 2, 2)
    >>> c.class_index.tolist()
    [0, 1, 1, 2, 2]
    """
    check_choice(scheme, "scheme", "classify", SCHEMES)
    x, index = _as_values(values, "classify")
    ok = ~np.isnan(x)
    v = x[ok]
    notes: list[str] = []
    open_low = open_high = False
    if scheme in ("user", "relative_risk"):
        if breaks is None:
            if scheme == "user":
                raise ParameterError(
                    "The 'breaks' parameter of classify must be a sequence of increasing cut "
                    "points when scheme='user'. Got None instead."
                )
            cuts = np.array(relative_risk_breaks())
        else:
            cuts = np.asarray(breaks, dtype=float).ravel()
            if cuts.size == 0 or not np.all(np.isfinite(cuts)) or np.any(np.diff(cuts) <= 0):
                raise ParameterError(
                    "The 'breaks' parameter of classify must be finite, strictly increasing "
                    f"cut points. Got {list(np.asarray(breaks).ravel())!r} instead."
                )
            if scheme == "relative_risk" and np.any(cuts <= 0):
                raise ParameterError(
                    "The 'breaks' parameter of classify must be positive cut points for "
                    f"scheme='relative_risk' (ratios). Got {cuts.tolist()!r} instead."
                )
        low = 0.0 if scheme == "relative_risk" and (v.size == 0 or v.min() >= 0) else -np.inf
        edges = np.concatenate([[low], cuts, [np.inf]])
        open_low, open_high = low == -np.inf or scheme == "relative_risk", True
    else:
        if breaks is not None:
            raise ParameterError(
                f"The 'breaks' parameter of classify must be None when scheme={scheme!r} "
                f"(the cut points come from the data). Got {list(breaks)!r} instead; "
                "use scheme='user' to give cut points."
            )
        k = check_positive_int(k, "k", "classify")
        if v.size == 0:
            raise InputError("classify got no non-missing values; there is nothing to classify.")
        lo, hi = float(v.min()), float(v.max())
        if scheme == "quantiles":
            cuts = np.quantile(v, np.arange(1, k) / k)
        elif scheme == "equal_intervals":
            cuts = lo + (hi - lo) * np.arange(1, k) / k
        else:
            cuts, note = natural_breaks(v, k, max_values=max_values)
            cuts = np.asarray(cuts, dtype=float)
            if note:
                notes.append(note)
        cuts = np.unique(cuts)
        cuts = cuts[(cuts >= lo) & (cuts < hi)]
        if cuts.size < k - 1:
            msg = (f"{scheme.replace('_', ' ')} gave {cuts.size + 1} classes instead of {k} "
                   "because of tied or too few distinct values")
            notes.append(msg)
            warnings.warn(msg + ".", DataWarning, stacklevel=2)
        edges = np.concatenate([[lo], cuts, [hi]])
    cls = np.full(x.size, -1, dtype=np.int64)
    cls[ok] = np.searchsorted(edges[1:-1], v, side="left")
    nclass = edges.size - 1
    counts = np.bincount(cls[ok], minlength=nclass)
    return Classification(
        scheme=scheme,
        breaks=tuple(float(b) for b in edges[1:-1]),
        edges=tuple(float(e) for e in edges),
        labels=_labels(edges, open_low, open_high),
        counts=tuple(int(c) for c in counts),
        class_index=cls,
        index=index,
        n_missing=int((~ok).sum()),
        variance_fit=_ssq_split(v, cls[ok], nclass),
        notes=tuple(notes),
    )


# ------------------------------------------------------------------------ class colours
_CLASS_PALETTES = ("sequential", "diverging", "cividis")

# ----------------------------------------------------------------------------- colours
_XYZ_D65 = np.array([0.95047, 1.0, 1.08883])
_XYZ_TO_RGB = np.array(
    [[3.2404542, -1.5371385, -0.4985314], [-0.9692660, 1.8760108, 0.0415560],
     [0.0556434, -0.2040259, 1.0572252]]
)
# Anchor colours in CIELAB (L*, a*, b*), chosen for this package.
_SEQUENTIAL_LAB = np.array([[96.0, -3.0, 22.0], [63.0, -9.0, -17.0], [24.0, 12.0, -42.0]])
_DIVERGING_LAB = np.array([[34.0, 10.0, -50.0], [96.0, 0.0, 2.0], [38.0, 38.0, 46.0]])


def _lab_to_rgb_raw(lab: np.ndarray) -> np.ndarray:
    lab = np.atleast_2d(lab)
    fy = (lab[:, 0] + 16.0) / 116.0
    f = np.stack([fy + lab[:, 1] / 500.0, fy, fy - lab[:, 2] / 200.0], axis=1)
    d = 6.0 / 29.0
    xyz = np.where(f > d, f**3, 3 * d * d * (f - 4.0 / 29.0)) * _XYZ_D65
    lin = xyz @ _XYZ_TO_RGB.T
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * np.abs(lin) ** (1 / 2.4) - 0.055)


def _lab_to_rgb(lab: np.ndarray) -> np.ndarray:
    """CIELAB (D65) to sRGB in [0, 1]; out-of-gamut colours lose chroma, keeping L* and hue."""
    lab = np.atleast_2d(np.asarray(lab, dtype=float))

    def in_gamut(scale: np.ndarray) -> np.ndarray:
        rgb = _lab_to_rgb_raw(lab * np.c_[np.ones(len(lab)), scale, scale])
        return np.all((rgb >= -1e-9) & (rgb <= 1 + 1e-9), axis=1)

    lo, hi = np.zeros(len(lab)), np.ones(len(lab))
    inside = in_gamut(hi)
    for _ in range(30):  # bisection on the chroma scale of out-of-gamut colours
        mid = (lo + hi) / 2
        ok = in_gamut(mid)
        lo, hi = np.where(ok, mid, lo), np.where(ok, hi, mid)
    scale = np.where(inside, 1.0, lo)
    return np.clip(_lab_to_rgb_raw(lab * np.c_[np.ones(len(lab)), scale, scale]), 0, 1)


def _ramp(anchors: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Piecewise-linear interpolation in CIELAB between equally spaced anchors, t in [0, 1]."""
    t = np.clip(np.asarray(t, dtype=float), 0, 1)
    pos = np.linspace(0, 1, len(anchors))
    lab = np.stack([np.interp(t, pos, anchors[:, j]) for j in range(3)], axis=1)
    return _lab_to_rgb(lab)


def palette_colours(palette: str, n: int) -> list[tuple[float, float, float, float]]:
    """``n`` evenly spaced RGBA colours from a named palette.

    Parameters
    ----------
    palette : {"sequential", "diverging", "cividis"}
        See the module notes for the design of each.
    n : int
        Number of colours (>= 1).

    Examples
    --------
    >>> len(palette_colours("diverging", 9))
    9
    >>> palette_colours("diverging", 3)[1][:3] == palette_colours("diverging", 3)[1][:3]
    True
    """
    check_choice(palette, "palette", "palette_colours", _CLASS_PALETTES)
    if n < 1:
        raise ParameterError(f"The 'n' parameter of palette_colours must be an integer >= 1. Got {n!r} instead.")
    if palette == "cividis":
        t = np.linspace(1.0, 0.0, n) if n > 1 else np.array([0.5])
        return [tuple(float(c) for c in matplotlib.colormaps["cividis"](v)) for v in t]
    if palette == "sequential":
        t = np.linspace(0.06, 1.0, n) if n > 1 else np.array([0.5])
        rgb = _ramp(_SEQUENTIAL_LAB, t)
    else:
        t = np.linspace(0.0, 1.0, n) if n > 1 else np.array([0.5])
        rgb = _ramp(_DIVERGING_LAB, t)
    return [(float(r), float(g), float(b), 1.0) for r, g, b in rgb]


def class_colours(
    classification: Classification, palette="sequential", *, centre: float | None = None, log: bool = True
) -> list[tuple[float, float, float, float]]:
    """One RGBA colour per class.

    Parameters
    ----------
    classification : Classification
    palette : {"sequential", "diverging", "cividis"} or sequence of colours
        A sequence must hold one matplotlib colour per class.
    centre : float, optional
        Diverging palette only: the value that gets the neutral colour. Each
        class is placed on the palette by the signed distance of its midpoint
        from ``centre`` (on the log scale when ``log``), scaled by the largest
        distance, so the colours stay centred even for asymmetric breaks.
        Without ``centre`` the colours are evenly spaced by class order.
    log : bool, default=True
        Measure distances from ``centre`` on the log scale (ratios).

    Examples
    --------
    >>> c = classify([0.5, 1.0, 2.0], scheme="relative_risk", breaks=[0.8, 1.25])
    >>> cols = class_colours(c, "diverging", centre=1.0)
    >>> cols[1] == palette_colours("diverging", 3)[1]
    True
    """
    k = classification.k
    if not isinstance(palette, str):
        cols = [to_rgba(c) for c in palette]
        if len(cols) != k:
            raise ParameterError(
                f"The 'palette' parameter of class_colours must hold one colour per class ({k}). "
                f"Got {len(cols)} colours instead."
            )
        return cols
    check_choice(palette, "palette", "class_colours", _CLASS_PALETTES)
    if palette != "diverging" or centre is None or k == 1:
        return palette_colours(palette, k)
    e = np.array(classification.edges, dtype=float)
    lo, hi = e[:-1].copy(), e[1:].copy()
    if log:
        if centre <= 0:
            raise ParameterError(
                f"The 'centre' parameter of class_colours must be > 0 when log=True. Got {centre!r} instead."
            )
        lo = np.where(lo <= 0, np.nan, lo)
        lo, hi = np.log(lo), np.log(hi)
        c0 = math.log(centre)
    else:
        c0 = centre
    fin_lo, fin_hi = np.isfinite(lo), np.isfinite(hi)
    step = np.nanmedian(np.where(fin_lo & fin_hi, hi - lo, np.nan)) if np.any(fin_lo & fin_hi) else 1.0
    step = step if np.isfinite(step) and step > 0 else 1.0
    lo = np.where(fin_lo, lo, hi - step)
    hi = np.where(fin_hi, hi, lo + step)
    d = (lo + hi) / 2 - c0
    scale = np.max(np.abs(d)) or 1.0
    rgb = _ramp(_DIVERGING_LAB, 0.5 + 0.5 * d / scale)
    return [(float(r), float(g), float(b), 1.0) for r, g, b in rgb]


def bivariate_colours() -> np.ndarray:
    """The 3 × 3 colours of :func:`bivariate_map`, shape (3, 3, 4) RGBA.

    Row ``r`` is the relative-risk class (0 low, 1 near the threshold, 2 high),
    column ``c`` the exceedance-probability class (0: P(RR > c) below the lower
    band, good evidence of lowered risk; 1: inconclusive; 2: above the upper
    band, good evidence of raised risk).

    Notes
    -----
    Designed in CIELAB for this package. Certainty comes first: the whole
    inconclusive column is pale (L* 91 to 96, a faint tint of the estimate's
    direction), whatever the size of the estimate, so a map where most
    districts are uncertain looks mostly pale. In the two certain columns the
    hue is the direction of the evidence (burnt orange raised, deep blue
    lowered; the ends of the diverging palette) and darkness grows with the
    size of the estimate in that direction: a large, certain excess is the
    darkest orange (L* 42), a certain but small one (risk class near 1) is a
    middle orange (L* 62), and the rare contradictory cell (low estimate with
    good evidence of raised risk) a light greyish orange (L* 76). Every certain
    cell is darker than every uncertain one.

    Examples
    --------
    >>> bivariate_colours().shape
    (3, 3, 4)
    """
    raised = _DIVERGING_LAB[2, 1:] / np.linalg.norm(_DIVERGING_LAB[2, 1:])
    lowered = _DIVERGING_LAB[0, 1:] / np.linalg.norm(_DIVERGING_LAB[0, 1:])
    # (L*, chroma) by size of the estimate in the evidence's direction: opposite, near 1, along
    certain = np.array([[76.0, 12.0], [62.0, 32.0], [42.0, 56.0]])
    lab = np.zeros((3, 3, 3))
    for r in range(3):
        # column 0: evidence of lowered risk, so a low estimate (row 0) is "along"
        lab[r, 0] = [certain[2 - r, 0], *(certain[2 - r, 1] * lowered)]
        lab[r, 2] = [certain[r, 0], *(certain[r, 1] * raised)]
        tint = (lowered, np.zeros(2), raised)[r]
        lab[r, 1] = [(91.0, 96.0, 91.0)[r], *(18.0 * tint)]
    rgb = _lab_to_rgb(lab.reshape(9, 3)).reshape(3, 3, 3)
    return np.concatenate([rgb, np.ones((3, 3, 1))], axis=2)
