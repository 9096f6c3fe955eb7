"""Poisson scan statistic: purely spatial and prospective space-time.

The scan statistic looks at every candidate zone (a circle around a district
centroid, or a connected group grown through the neighbour graph), finds the
one whose counts are least compatible with the expected counts, and judges
it against the same search repeated on data simulated under "no cluster"
(Kulldorff 1997). Its p-value is therefore already corrected for having
looked everywhere. The prospective form (Kulldorff 2001) scans cylinders
whose height is the last 1..K weeks ending at the newest week: clusters that
are still going on.

Public functions: :func:`spatial_scan`, :func:`prospective_scan`,
:func:`scan_map`; results are :class:`ScanResult`.
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import shapely
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.lines import Line2D

from . import _scan_kernels as _k
from ._params import check_choice, check_interval, check_positive_int
from .autocorrelation import _check_seed, _permutation_streams, _resolve_seed
from .errors import GraphError, InputError, ParameterError, format_examples
from .graphs import AreaGraph

__all__ = ["ScanResult", "spatial_scan", "prospective_scan", "scan_map", "SCAN_DIRECTIONS"]

#: Allowed values of ``direction``: raised risk, lowered risk, or either.
SCAN_DIRECTIONS = ("high", "low", "both")
_DIRECTION_CODE = {"high": 1, "low": -1, "both": 0}
_EULER_GAMMA = 0.5772156649015329
_BLOCK = 32  # replicates summed side by side in one pass over the zone lists
_ZONE_OUTLINE = "#000000"  # black outlines read over both ends of the diverging palette
_ZONE_OUTLINE_MINOR = "#555555"


# ------------------------------------------------------------------ result
@dataclass(frozen=True, eq=False)
class ScanResult:
    """Zones reported by a scan statistic, most likely first.

    Attributes
    ----------
    ids : pandas.Index
        District ids in the order used.
    kind : str
        ``"spatial"`` or ``"space-time"``.
    direction : str
        ``"high"``, ``"low"`` or ``"both"``.
    members : tuple of ndarray
        Positions (into ``ids``) of each reported zone's districts, centre first.
    centre : ndarray of int
        Position of each zone's centre district.
    radius : ndarray
        Distance from the centre to the farthest member (map units; for graph
        zones the same measure, though the zone is not a circle).
    population, observed, expected : ndarray
        Population at risk, observed and expected counts inside each zone
        (cylinder). Expected counts are scaled so they sum to the total count.
    llr : ndarray
        Log likelihood ratio of each zone.
    p_value : ndarray
        Monte Carlo p-value ``(1 + #{replicate maxima >= LLR}) / (R + 1)``.
    p_gumbel : ndarray
        p-value from a Gumbel distribution fitted to the replicate maxima.
    weeks : ndarray of int
        Cylinder height in weeks (0 for a purely spatial scan).
    week_labels : tuple of str
        Labels of the weeks scanned, oldest first (empty for a spatial scan).
    total_cases, total_expected : float
        Total observed count and total expected (equal, after scaling).
    district_observed, district_expected : ndarray
        Per-district observed and expected counts over the scanned period (for
        a space-time scan: the last ``max_weeks`` weeks).
    replicate_maxima : ndarray
        Largest LLR of each replicate (the null distribution).
    n_zones : int
        Number of candidate zones (cylinders) compared.
    settings : dict
        The options used (zone shape, max_share, replicates, seed, alpha ...).
    """

    ids: pd.Index
    kind: str
    direction: str
    members: tuple
    centre: np.ndarray
    radius: np.ndarray
    population: np.ndarray
    observed: np.ndarray
    expected: np.ndarray
    llr: np.ndarray
    p_value: np.ndarray
    p_gumbel: np.ndarray
    weeks: np.ndarray
    week_labels: tuple
    total_cases: float
    total_expected: float
    district_observed: np.ndarray
    district_expected: np.ndarray
    replicate_maxima: np.ndarray
    n_zones: int
    settings: dict = field(default_factory=dict)

    @property
    def alpha(self) -> float:
        """Significance level used for the ``significant`` column."""
        return float(self.settings.get("alpha", 0.05))

    @property
    def significant(self) -> np.ndarray:
        """``p_value < alpha`` for each reported zone."""
        return self.p_value < self.alpha

    def to_frame(self) -> pd.DataFrame:
        """One row per reported zone, indexed by rank (1 = most likely zone).

        Columns: centre, members (tuple of ids), n_districts, radius,
        population, observed, expected, ratio_inside (O/E inside),
        ratio_outside (O/E outside), risk_ratio (inside / outside), llr,
        p_value, p_gumbel, significant; for a space-time scan also weeks,
        first_week and last_week.
        """
        c, e, tot = self.observed, self.expected, self.total_cases
        with np.errstate(divide="ignore", invalid="ignore"):
            inside = c / e
            outside = (tot - c) / (self.total_expected - e)
            rr = inside / outside
        frame = pd.DataFrame(
            {
                "centre": [self.ids[i] for i in self.centre],
                "members": [tuple(self.ids[m]) for m in self.members],
                "n_districts": np.array([len(m) for m in self.members], dtype=np.int64),
                "radius": self.radius,
                "population": self.population,
                "observed": self.observed,
                "expected": self.expected,
                "ratio_inside": inside,
                "ratio_outside": outside,
                "risk_ratio": rr,
                "llr": self.llr,
                "p_value": self.p_value,
                "p_gumbel": self.p_gumbel,
                "significant": self.significant,
            },
            index=pd.RangeIndex(1, len(self.llr) + 1, name="rank"),
        )
        if self.kind == "space-time":
            labels = self.week_labels
            frame["weeks"] = self.weeks
            frame["first_week"] = [labels[len(labels) - h] for h in self.weeks]
            frame["last_week"] = labels[-1] if labels else None
        return frame

    def district_membership(self) -> pd.DataFrame:
        """Per-district table indexed by id: ``zone`` (rank of the reported zone
        holding it, 0 for none), ``zone_p_value`` and ``in_significant_zone``."""
        rank = np.zeros(len(self.ids), dtype=np.int64)
        pz = np.full(len(self.ids), np.nan)
        for r, m in enumerate(self.members, start=1):
            rank[m] = r
            pz[m] = self.p_value[r - 1]
        sig = np.zeros(len(self.ids), dtype=bool)
        for m, s in zip(self.members, self.significant):
            if s:
                sig[m] = True
        return pd.DataFrame({"zone": rank, "zone_p_value": pz, "in_significant_zone": sig}, index=self.ids)

    def summary(self) -> str:
        """Readable text (the library never prints)."""
        st = self.settings
        what = "space-time (prospective)" if self.kind == "space-time" else "spatial"
        lines = [
            (f"Poisson {what} scan for {self.direction} risk: {len(self.ids)} districts, "
             f"{self.n_zones:,} candidate zones ({st.get('zone_shape', 'circle')} zones, up to "
             f"{st.get('max_share', 0.1):.0%} of the population), {int(self.total_cases)} cases, "
             f"{st.get('replicates', 0)} replicates (seed {st.get('seed')})."),
        ]
        if not len(self.llr):
            lines.append("  No zone departs from the expected counts in the scanned direction.")
        for r, row in self.to_frame().iterrows():
            when = f", last {row.weeks} week(s) from {row.first_week}" if self.kind == "space-time" else ""
            lines.append(
                f"  {r}. centre {row.centre}, {row.n_districts} district(s){when}: observed {row.observed:.0f}, "
                f"expected {row.expected:.1f} (O/E {row.ratio_inside:.2f} inside, {row.ratio_outside:.2f} outside), "
                f"LLR {row.llr:.2f}, p = {row.p_value:.4g} (Gumbel {row.p_gumbel:.3g})"
                + (" *" if row.significant else "")
            )
        lines.append(
            f"  * p < {self.alpha:g}. Zones after the first are ranked against the same null distribution "
            "(conservative). The smallest Monte Carlo p-value is "
            f"{1 / (st.get('replicates', 0) + 1):.3g}; the Gumbel p-value resolves smaller ones."
        )
        if self.kind == "space-time":
            lines.append(
                "  Repeating the analysis every week gives about one false signal at p < 0.05 every 20 weeks "
                "(recurrence interval 1/p weeks)."
            )
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        frame = self.to_frame()
        frame["members"] = frame["members"].map(lambda t: ", ".join(map(str, t)))
        head = html.escape(self.summary().splitlines()[0])
        return f"<p>{head}</p>" + frame.to_html(float_format="%.4g")


# ------------------------------------------------------------------ inputs
def _vector(x, ids: pd.Index | None, func: str, name: str) -> tuple[np.ndarray, pd.Index | None]:
    if isinstance(x, pd.DataFrame):
        raise InputError(f"'{name}' given to {func} is a table; pass one column (a Series) or a 1-D array.")
    if isinstance(x, pd.Series):
        if not x.index.is_unique:
            dup = x.index[x.index.duplicated()].unique()
            raise InputError(f"'{name}' given to {func} repeats district ids ({format_examples(dup)}).")
        if ids is not None:
            missing = ids.difference(x.index)
            if len(missing):
                raise InputError(
                    f"'{name}' given to {func} has no value for {len(missing)} district(s) "
                    f"({format_examples(missing)}). Give one value per district."
                )
            x = x.reindex(ids)
        else:
            ids = x.index
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim != 1:
        raise InputError(f"'{name}' given to {func} must be one-dimensional; got shape {arr.shape}.")
    if ids is not None and arr.size != len(ids):
        raise InputError(f"'{name}' given to {func} has {arr.size} values for {len(ids)} districts.")
    bad = ~np.isfinite(arr) | (arr < 0)
    if bad.any():
        where = ids[bad] if ids is not None else np.flatnonzero(bad)
        raise InputError(
            f"'{name}' given to {func} has {int(bad.sum())} missing, negative or infinite value(s) "
            f"(districts {format_examples(where)}). Values must be finite and >= 0."
        )
    return arr, ids


def _counts(arr: np.ndarray, ids, func: str, name: str = "cases") -> np.ndarray:
    frac = arr != np.round(arr)
    if frac.any():
        where = ids[frac] if ids is not None else np.flatnonzero(frac)
        raise InputError(
            f"'{name}' given to {func} has {int(frac.sum())} non-whole count(s) (districts "
            f"{format_examples(where)}). The Poisson scan needs whole case counts."
        )
    return arr.astype(np.int64)


def _coordinates(locations, ids: pd.Index, func: str) -> np.ndarray:
    """Planar (x, y) per district: centroids of boundaries, or given points (e.g. population-weighted)."""
    if hasattr(locations, "geometry"):
        from .graphs import _planar, _points

        geo = locations.geometry
        if not geo.index.is_unique or len(ids.difference(geo.index)):
            missing = ids.difference(geo.index) if geo.index.is_unique else geo.index[geo.index.duplicated()]
            raise InputError(
                f"The boundaries given to {func} do not match the districts: {len(missing)} id(s) missing or "
                f"repeated ({format_examples(missing)}). Use the boundaries the counts were read with."
            )
        geo = geo.reindex(ids)
        planar, _ = _planar(geo, purpose=func, require_crs=False, stacklevel=5)
        return _points(planar, "centroid")
    if isinstance(locations, pd.DataFrame):
        if locations.shape[1] != 2:
            raise InputError(
                f"The locations given to {func} have {locations.shape[1]} columns; give two (x, y), "
                "e.g. population-weighted centroids in a projected CRS."
            )
        missing = ids.difference(locations.index)
        if len(missing):
            raise InputError(
                f"The locations given to {func} miss {len(missing)} district(s) ({format_examples(missing)})."
            )
        xy = locations.reindex(ids).to_numpy(dtype=np.float64)
    else:
        xy = np.asarray(locations, dtype=np.float64)
    if xy.shape != (len(ids), 2):
        raise InputError(
            f"The locations given to {func} must be one (x, y) pair per district, shape ({len(ids)}, 2); "
            f"got shape {xy.shape}."
        )
    if not np.isfinite(xy).all():
        raise InputError(f"The locations given to {func} have missing or infinite coordinates.")
    return xy


def _zone_lists(xy, pop, max_share, graph, ids, func):
    cap = max_share * float(pop.sum()) * (1 + 1e-12)
    if graph is None:
        return _k.circle_lists(xy, pop, cap)
    if not isinstance(graph, AreaGraph):
        raise ParameterError(
            f"The 'graph' parameter of {func} must be an AreaGraph or None. Got {type(graph).__name__} instead."
        )
    if not graph.ids.equals(ids):
        if len(graph.ids) != len(ids) or len(ids.difference(graph.ids)):
            raise GraphError(
                f"The graph given to {func} covers different districts from the counts "
                f"({format_examples(ids.symmetric_difference(graph.ids))}). Build it from the same boundaries."
            )
        order = graph.ids.get_indexer(ids)
        adj = graph.adjacency[order][:, order]
    else:
        adj = graph.adjacency
    adj = adj.tocsr()
    return _k.graph_lists(xy, pop, cap, adj.indptr, adj.indices)


def _check_common(func, max_share, direction, replicates, seed, alpha, max_zones):
    check_interval(max_share, "max_share", func, low=0.0, high=0.5, closed="right")
    check_choice(direction, "direction", func, SCAN_DIRECTIONS)
    replicates = check_positive_int(replicates, "replicates", func, minimum=1)
    seed = _check_seed(seed, func)
    check_interval(alpha, "alpha", func, low=0.0, high=1.0)
    max_zones = check_positive_int(max_zones, "max_zones", func, minimum=1)
    return replicates, seed, max_zones


# ------------------------------------------------------------------ engine
def _gumbel_p(x: np.ndarray, maxima: np.ndarray) -> np.ndarray:
    """Gumbel tail probability with location/scale fitted by moments to the replicate maxima."""
    if len(maxima) < 2:
        return np.full(len(x), np.nan)
    sd = float(np.std(maxima, ddof=1))
    if sd <= 0:
        return np.where(x > maxima[0], 0.0, 1.0)
    beta = sd * math.sqrt(6.0) / math.pi
    mu = float(np.mean(maxima)) - _EULER_GAMMA * beta
    return -np.expm1(-np.exp(-(np.asarray(x) - mu) / beta))


def _select_zones(members, offsets, valid, obs, exp, total, xl, code, max_zones):
    """Most likely zone, then the best zones overlapping none already chosen (greedy, by LLR)."""
    n = obs.shape[0]
    taken = np.zeros(n, dtype=np.bool_)
    out = []
    empty = np.zeros((0, obs.shape[1]))
    for _ in range(max_zones):
        best, blen, bh = _k.best_zones(members, offsets, valid, obs, exp, total, xl, code, taken, empty)
        i = int(np.argmax(best))
        if best[i] <= 0:
            break
        zone = members[offsets[i]:offsets[i] + blen[i]].astype(np.int64)
        out.append((i, zone, int(bh[i]), float(best[i])))
        taken[zone] = True
    return out


def _candidate_llrs(cases, expected, locations, *, population=None, graph=None, max_share=0.1,
                    direction="high") -> pd.DataFrame:
    """Every candidate zone of a spatial scan with its LLR (for inspection and tests; no inference).

    Columns: centre, members (tuple of ids, in the order they joined), observed, expected, llr.
    """
    func = "spatial_scan"
    ids, c, e, pop, xy, total = _spatial_inputs(cases, expected, locations, population, func)
    members, offsets, valid = _zone_lists(xy, pop, max_share, graph, ids, func)
    out = np.full((len(members), 1), np.nan)
    _k.best_zones(members, offsets, valid, c[:, None], e[:, None], total, _k.xlogx_table(total),
                  _DIRECTION_CODE[direction], np.zeros(len(ids), dtype=np.bool_), out)
    rows = []
    for i in range(len(ids)):
        for pos in range(offsets[i], offsets[i + 1]):
            if valid[pos]:
                m = members[offsets[i]:pos + 1]
                rows.append((ids[i], tuple(ids[m]), float(c[m].sum()), float(e[m].sum()), float(out[pos, 0])))
    return pd.DataFrame(rows, columns=["centre", "members", "observed", "expected", "llr"])


def _simulate(groups, n: int, nh: int, total: int, seed, replicates: int, run_block) -> np.ndarray:
    """Replicate maxima. ``groups``: per week (newest first) its total and district probabilities.

    Replicate ``r`` always draws from the stream spawned from ``(seed, r)``.
    """
    root = _resolve_seed(seed)
    maxima = np.zeros(replicates)
    for start in range(0, replicates, _BLOCK):
        stop = min(replicates, start + _BLOCK)
        block = np.zeros((n, nh, stop - start), dtype=np.int32)
        for b, gen in enumerate(_permutation_streams(root, start, stop)):
            acc = np.zeros(n, dtype=np.int32)
            for h, (tot, p) in enumerate(groups):
                acc += gen.multinomial(tot, p).astype(np.int32)
                block[:, h, b] = acc
        maxima[start:stop] = run_block(block)
    return maxima


def _scan(*, kind, ids, xy, pop, obs, exp, groups, total, week_labels, graph, max_share, direction,
          replicates, seed, alpha, max_zones, func, extra_settings):
    members, offsets, valid = _zone_lists(xy, pop, max_share, graph, ids, func)
    code = _DIRECTION_CODE[direction]
    xl = _k.xlogx_table(total)
    obs = np.ascontiguousarray(obs, dtype=np.int64)
    exp = np.ascontiguousarray(exp, dtype=np.float64)
    chosen = _select_zones(members, offsets, valid, obs, exp, total, xl, code, max_zones)

    def run_block(block):
        return _k.replicate_maxima(members, offsets, valid, block, exp, total, xl, code)

    maxima = _simulate(groups, len(ids), obs.shape[1], total, seed, replicates, run_block)
    llr = np.array([z[3] for z in chosen])
    tol = 1e-9 * np.maximum(1.0, np.abs(llr))
    p_mc = (1 + (maxima[None, :] >= (llr - tol)[:, None]).sum(axis=1)) / (replicates + 1)
    zones = tuple(z[1] for z in chosen)
    centre = np.array([z[0] for z in chosen], dtype=np.int64)
    heights = np.array([z[2] for z in chosen], dtype=np.int64)
    radius = np.array([float(np.max(np.hypot(*(xy[m] - xy[c]).T))) for c, m in zip(centre, zones)])
    observed = np.array([float(obs[m, h].sum()) for m, h in zip(zones, heights)])
    expected = np.array([float(exp[m, h].sum()) for m, h in zip(zones, heights)])
    n_valid = int(valid.sum()) * obs.shape[1]
    settings = {
        "zone_shape": "circle" if graph is None else "graph",
        "max_share": float(max_share),
        "replicates": replicates,
        "seed": seed,
        "alpha": float(alpha),
        "max_zones": max_zones,
        "direction": direction,
        **extra_settings,
    }
    return ScanResult(
        ids=ids, kind=kind, direction=direction, members=zones, centre=centre, radius=radius,
        population=np.array([float(pop[m].sum()) for m in zones]), observed=observed, expected=expected,
        llr=llr, p_value=p_mc, p_gumbel=_gumbel_p(llr, maxima),
        weeks=heights + 1 if kind == "space-time" else np.zeros(len(zones), dtype=np.int64),
        week_labels=tuple(week_labels), total_cases=float(total), total_expected=float(exp[:, -1].sum()),
        district_observed=obs[:, -1].astype(np.float64), district_expected=exp[:, -1].copy(),
        replicate_maxima=maxima, n_zones=n_valid, settings=settings,
    )


# ------------------------------------------------------------------ public API
def spatial_scan(
    cases,
    expected,
    locations,
    *,
    population=None,
    graph: AreaGraph | None = None,
    max_share: float = 0.1,
    direction: str = "high",
    replicates: int = 999,
    seed: int | None = 0,
    alpha: float = 0.05,
    max_zones: int = 10,
) -> ScanResult:
    """Poisson spatial scan statistic with Monte Carlo and Gumbel p-values.

    Parameters
    ----------
    cases : Series or array of int, shape (n,)
        Observed counts per district (a Series fixes the district ids).
    expected : Series or array, shape (n,)
        Expected counts under "no cluster" (e.g. indirectly standardized);
        only their shares matter, they are scaled to the total count.
    locations : GeoDataFrame or array/DataFrame of shape (n, 2)
        Boundaries (their centroids are used, projected when geographic) or
        (x, y) points such as population-weighted centroids, in a planar CRS.
    population : Series or array, optional
        Population at risk, for the zone-size limit; default ``expected``.
    graph : AreaGraph, optional
        When given, zones are connected groups grown through the graph from
        each centre by adding the nearest adjacent district (for long thin
        districts where centroids mislead); otherwise circles.
    max_share : float, default=0.1
        Largest share of the total population a zone may hold, in (0, 0.5].
    direction : {"high", "low", "both"}, default="high"
        Scan for raised risk, lowered risk, or either.
    replicates : int, default=999
        Monte Carlo replicates (multinomial given the total count).
    seed : int or None, default=0
        Replicate ``r`` uses the random stream spawned from ``(seed, r)``.
    alpha : float, default=0.05
        Level for the ``significant`` column.
    max_zones : int, default=10
        Most zones reported (the most likely zone and non-overlapping
        secondary zones, by decreasing LLR).

    Returns
    -------
    ScanResult

    Notes
    -----
    With ``C`` cases in total and expected counts scaled so they sum to ``C``,
    a zone with ``c`` observed and ``e`` expected cases has log likelihood
    ratio (Kulldorff 1997)

    .. math::

        \\mathrm{LLR} = c \\log\\frac{c}{e} + (C - c)\\log\\frac{C - c}{C - e}

    when ``c > e`` (scanning for high risk; ``c < e`` for low, either for
    both) and 0 otherwise. The most likely zone maximises the LLR over all
    candidate zones. Replicates redistribute the ``C`` cases over districts
    multinomially with probabilities ``e_i / C``; the Monte Carlo p-value is
    ``(1 + #{replicate maxima >= observed}) / (R + 1)``. The Gumbel p-value
    fits a Gumbel distribution to the replicate maxima by moments (Abrams,
    Kleinman & Kulldorff 2010) and resolves p-values below ``1/(R + 1)``.
    Secondary zones are compared with the same maxima, which is conservative.

    Cautions: the zone is a statistical construct (its edge is set by the
    candidate shapes, not by the cluster); small counts give unstable ratios;
    district-level excess says nothing about individuals (ecological
    fallacy); expected counts carry the assumptions of the standardization.

    References
    ----------
    Kulldorff M. (1997). A spatial scan statistic. Communications in
    Statistics - Theory and Methods 26(6):1481-1496.
    Abrams A.M., Kleinman K., Kulldorff M. (2010). Gumbel based p-value
    approximations for spatial scan statistics. International Journal of
    Health Geographics 9:61.
    Tango T., Takahashi K. (2005). A flexibly shaped spatial scan statistic
    for detecting clusters. International Journal of Health Geographics 4:11
    (connected zones through a neighbour graph).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([0.0, 1.0, 2.2, 3.0, 4.5, 5.1, 6.6, 7.2, 8.9, 9.5])
    >>> xy = np.column_stack([x, np.zeros(10)])
    >>> cases = np.array([2, 3, 2, 3, 12, 14, 2, 3, 2, 2])
    >>> res = spatial_scan(cases, np.ones(10), xy, max_share=0.2, replicates=99, seed=1)
    >>> res.to_frame().loc[1, "members"]
    (4, 5)
    >>> bool(res.p_value[0] < 0.05)
    True
    """
    func = "spatial_scan"
    replicates, seed, max_zones = _check_common(func, max_share, direction, replicates, seed, alpha, max_zones)
    ids, c, e, pop, xy, total = _spatial_inputs(cases, expected, locations, population, func)
    groups = [(total, _probabilities(e))]
    return _scan(kind="spatial", ids=ids, xy=xy, pop=pop, obs=c[:, None], exp=e[:, None], groups=groups,
                 total=total, week_labels=(), graph=graph, max_share=max_share, direction=direction,
                 replicates=replicates, seed=seed, alpha=alpha, max_zones=max_zones, func=func,
                 extra_settings={})


def _spatial_inputs(cases, expected, locations, population, func):
    """Checked per-district arrays: ids, counts, expected scaled to the total, population, coordinates, total."""
    ids = cases.index if isinstance(cases, pd.Series) else None
    c, ids = _vector(cases, ids, func, "cases")
    e, ids = _vector(expected, ids, func, "expected")
    ids = pd.RangeIndex(len(c)) if ids is None else ids
    c = _counts(c, ids, func)
    pop = _vector(population, ids, func, "population")[0] if population is not None else e
    xy = _coordinates(locations, ids, func)
    _check_expected(c[:, None], e[:, None], ids, func)
    total = int(c.sum())
    return ids, c, e * (total / e.sum()), pop, xy, total


def _probabilities(e: np.ndarray) -> np.ndarray:
    p = e / e.sum()
    return p / p.sum()


def _check_expected(c: np.ndarray, e: np.ndarray, ids, func: str) -> None:
    if c.sum() == 0:
        raise InputError(f"{func} got no cases at all; the scan statistic needs at least one case.")
    bad = ((e <= 0) & (c > 0)).any(axis=1)
    if bad.any():
        raise InputError(
            f"{func} got cases where the expected count is 0 in {int(bad.sum())} district(s) "
            f"({format_examples(ids[bad])}); the likelihood ratio would be infinite. Check the population "
            "or reference rates of these districts."
        )
    if e.sum() <= 0:
        raise InputError(f"The expected counts given to {func} are all 0.")


def _week_table(x, ids, func, name):
    if isinstance(x, pd.DataFrame):
        missing = ids.difference(x.index) if ids is not None else pd.Index([])
        if len(missing):
            raise InputError(
                f"'{name}' given to {func} has no row for {len(missing)} district(s) ({format_examples(missing)})."
            )
        frame = x.reindex(ids) if ids is not None else x
        arr = frame.to_numpy(dtype=np.float64)
        labels = [str(w) for w in frame.columns]
        ids = frame.index
    else:
        arr = np.asarray(x, dtype=np.float64)
        labels = [str(w) for w in range(arr.shape[1])] if arr.ndim == 2 else []
    if arr.ndim != 2:
        raise InputError(f"'{name}' given to {func} must be a table of districts by weeks; got shape {arr.shape}.")
    bad = ~np.isfinite(arr) | (arr < 0)
    if bad.any():
        raise InputError(
            f"'{name}' given to {func} has {int(bad.sum())} missing, negative or infinite value(s). "
            "Fill missing weeks with 0 cases only if none were reported."
        )
    return arr, labels, ids


def prospective_scan(
    cases,
    expected,
    locations,
    *,
    max_weeks: int = 4,
    baseline: str = "history",
    population=None,
    graph: AreaGraph | None = None,
    max_share: float = 0.1,
    direction: str = "high",
    replicates: int = 999,
    seed: int | None = 0,
    alpha: float = 0.05,
    max_zones: int = 10,
) -> ScanResult:
    """Prospective space-time Poisson scan: zones with an excess in the last 1..K weeks.

    Parameters
    ----------
    cases : DataFrame (districts x weeks) or array, shape (n, T)
        Weekly counts, oldest week first; the last column is the newest week.
    expected : DataFrame like ``cases``, or Series/array of shape (n,)
        Expected counts per district and week (a vector: the same every week).
    locations, population, graph, max_share, direction, replicates, seed, alpha, max_zones
        As in :func:`spatial_scan`.
    max_weeks : int, default=4
        Largest cylinder height K: cylinders cover the last 1..K weeks.
    baseline : {"history", "expected"}, default="history"
        ``"history"``: each district's expected share of the recent weeks'
        cases comes from its share of the earlier weeks (T - K >= 1 needed),
        shrunk towards its share of ``expected`` with the weight of one
        average week of cases, so a district with no past cases still has a
        positive expectation; only the last K weeks are scanned.
        ``"expected"``: ``expected`` sets every district-week's share; all T
        weeks form the study period and the earlier weeks lie outside every
        cylinder.

    Returns
    -------
    ScanResult
        With ``kind="space-time"``; ``weeks`` holds each cylinder's height.

    Notes
    -----
    The expected counts of each week are scaled so they sum to that week's
    observed total, which removes purely temporal change (a region-wide rise
    is not a cluster); replicates redistribute each recent week's total over
    the districts multinomially. A cylinder of zone ``Z`` and height ``h``
    holds ``c`` cases of ``C`` and ``e`` expected; its LLR is the formula of
    :func:`spatial_scan` (Kulldorff 2001). Candidates: every zone times every
    height 1..K, all ending at the newest week, so only clusters still going
    on are found.

    The p-value refers to this one analysis. Run every week, a p-value below
    0.05 will appear by chance about once in 20 weeks; Kulldorff (2001)
    reads ``1/p`` as a recurrence interval in weeks.

    References
    ----------
    Kulldorff M. (2001). Prospective time periodic geographical disease
    surveillance using a scan statistic. Journal of the Royal Statistical
    Society A 164(1):61-72.

    Examples
    --------
    >>> import numpy as np
    >>> xy = np.column_stack([[0.0, 1.0, 2.2, 3.0, 4.5, 5.1, 6.6, 7.2], np.zeros(8)])
    >>> weeks = np.full((8, 10), 3)
    >>> weeks[2:4, -2:] = 12
    >>> res = prospective_scan(weeks, np.ones(8), xy, max_share=0.25, replicates=99, seed=2)
    >>> sorted(res.to_frame().loc[1, "members"]), int(res.weeks[0])
    ([2, 3], 2)
    """
    func = "prospective_scan"
    replicates, seed, max_zones = _check_common(func, max_share, direction, replicates, seed, alpha, max_zones)
    max_weeks = check_positive_int(max_weeks, "max_weeks", func, minimum=1)
    check_choice(baseline, "baseline", func, ("history", "expected"))
    ids = cases.index if isinstance(cases, pd.DataFrame) else None
    y, labels, ids = _week_table(cases, ids, func, "cases")
    if ids is None:
        ids = pd.RangeIndex(y.shape[0])
    y = _counts(y.ravel(), None, func).reshape(y.shape)
    n, n_weeks = y.shape
    if isinstance(expected, pd.DataFrame) or np.ndim(expected) == 2:
        mu, _, _ = _week_table(expected, ids, func, "expected")
        if mu.shape != y.shape:
            raise InputError(f"'expected' given to {func} has shape {mu.shape}; 'cases' has {y.shape}.")
    else:
        mu = np.repeat(_vector(expected, ids, func, "expected")[0][:, None], n_weeks, axis=1)
    need = max_weeks + (1 if baseline == "history" else 0)
    if n_weeks < need:
        raise InputError(
            f"{func} needs at least {need} weeks of counts for max_weeks={max_weeks} with baseline='{baseline}'; "
            f"got {n_weeks}. Give more weeks or lower max_weeks."
        )
    recent = y[:, -max_weeks:][:, ::-1]  # newest first
    if baseline == "history":
        past = y[:, :-max_weeks].sum(axis=1).astype(np.float64)
        ref = mu[:, :-max_weeks].sum(axis=1)
        if ref.sum() <= 0:
            raise InputError(f"The expected counts given to {func} are all 0 in the baseline weeks.")
        weight = past.sum() / (n_weeks - max_weeks)
        share = (past + weight * ref / ref.sum()) / (past.sum() + weight) if past.sum() > 0 else ref / ref.sum()
        mu_recent = np.repeat(share[:, None], max_weeks, axis=1)
        earlier_total = 0
    else:
        mu_recent = mu[:, -max_weeks:][:, ::-1]
        earlier_total = int(y[:, :-max_weeks].sum())
    week_tot = recent.sum(axis=0)
    col = mu_recent.sum(axis=0)
    if (col <= 0).any():
        raise InputError(f"The expected counts given to {func} are all 0 in at least one recent week.")
    _check_expected(recent, mu_recent, ids, func)
    mu_recent = mu_recent * (week_tot / col)[None, :]
    total = int(week_tot.sum()) + earlier_total
    pop = _vector(population, ids, func, "population")[0] if population is not None else mu.sum(axis=1)
    xy = _coordinates(locations, ids, func)
    groups = [(int(t), _probabilities(mu_recent[:, w]) if t > 0 else np.full(n, 1.0 / n))
              for w, t in enumerate(week_tot)]
    return _scan(kind="space-time", ids=ids, xy=xy, pop=pop, obs=np.cumsum(recent, axis=1),
                 exp=np.cumsum(mu_recent, axis=1), groups=groups, total=total,
                 week_labels=labels[-max_weeks:], graph=graph, max_share=max_share, direction=direction,
                 replicates=replicates, seed=seed, alpha=alpha, max_zones=max_zones, func=func,
                 extra_settings={"max_weeks": max_weeks, "baseline": baseline})


# ------------------------------------------------------------------ map
def scan_map(
    gdf,
    result: ScanResult,
    values=None,
    *,
    ax: Axes | None = None,
    significant_only: bool = False,
    title: str | None = None,
    legend_title: str | None = "Observed / expected",
    **choropleth_options,
) -> Axes:
    """Outline the reported zones over a choropleth.

    Parameters
    ----------
    gdf : GeoDataFrame
        District boundaries (indexed by the district ids of ``result``).
    result : ScanResult
    values : str, Series or array, optional
        What to shade; default the district observed / expected ratio over the
        scanned period, on the relative-risk scale.
    ax : matplotlib Axes, optional
    significant_only : bool, default=False
        Outline only zones with ``p < alpha``.
    title, legend_title
        As in :func:`areamap.maps.choropleth`.
    **choropleth_options
        Passed to :func:`areamap.maps.choropleth`.

    Returns
    -------
    matplotlib Axes

    Notes
    -----
    Significant zones have a solid black outline, others a dashed grey one;
    each carries its rank. The outline is the union of the member districts,
    not the circle that defined the zone.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame(geometry=[box(i, 0, i + 1, 1 + i % 3) for i in range(10)], crs=27700)
    >>> res = spatial_scan(np.array([2, 3, 2, 12, 14, 3, 2, 3, 2, 2]), np.ones(10), g,
    ...                    max_share=0.2, replicates=99)
    >>> ax = scan_map(g, res)
    >>> [c.get_gid() for c in ax.collections if str(c.get_gid()).startswith("scan-zone")][:1]
    ['scan-zone-1']
    """
    from .maps import _area_paths, _draw, choropleth

    func = "scan_map"
    if not isinstance(result, ScanResult):
        raise ParameterError(
            f"The 'result' parameter of {func} must be a ScanResult. Got {type(result).__name__} instead."
        )
    if not hasattr(gdf, "geometry"):
        raise ParameterError(f"The 'gdf' parameter of {func} must be a GeoDataFrame. Got {type(gdf).__name__} instead.")
    missing = result.ids.difference(gdf.index)
    if len(missing):
        raise InputError(
            f"The boundaries given to {func} miss {len(missing)} district(s) of the scan ({format_examples(missing)})."
        )
    if values is None:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = result.district_observed / result.district_expected
        values = pd.Series(ratio, index=result.ids).reindex(gdf.index)
        choropleth_options.setdefault("scheme", "relative_risk")
    ax = choropleth(gdf, values, ax=ax, title=title, legend_title=legend_title, **choropleth_options)
    geom = gdf.geometry.reindex(result.ids).to_numpy()
    handles = []
    for rank, (m, sig) in enumerate(zip(result.members, result.significant), start=1):
        if significant_only and not sig:
            continue
        shape = shapely.union_all(geom[m])
        colour = _ZONE_OUTLINE if sig else _ZONE_OUTLINE_MINOR
        _draw(ax, _area_paths([shape]), "none", gid=f"scan-zone-{rank}", edgecolor=colour,
              linewidth=2.2 if sig else 1.4, zorder=4, linestyle="solid" if sig else "dashed")
        pt = shape.representative_point()
        ax.annotate(str(rank), (pt.x, pt.y), fontsize=9, fontweight="bold", ha="center", va="center", zorder=6,
                    color=colour, path_effects=[patheffects.withStroke(linewidth=2.5, foreground="white")])
    if result.significant.any():
        handles.append(Line2D([], [], color=_ZONE_OUTLINE, lw=2.2, label=f"scan zone, p < {result.alpha:g}"))
    if not significant_only and (~result.significant).any():
        handles.append(Line2D([], [], color=_ZONE_OUTLINE_MINOR, lw=1.4, ls="--", label="scan zone, not significant"))
    if handles:
        first = ax.get_legend()
        leg = ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(1.01, 0.0), fontsize=7.5, frameon=False)
        leg.set_gid("scan-legend")
        if first is not None:
            ax.add_artist(first)
    return ax
