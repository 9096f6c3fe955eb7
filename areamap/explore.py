"""An explorable district map for an offline HTML page: inline SVG and a small plain script.

:func:`explorable_map` returns an HTML fragment with

* an inline SVG with one ``<path>`` per district (coloured by a class, with
  ``tabindex="0"`` and an accessible name), so a pointer, a tap or keyboard
  focus selects a district;
* a panel that shows the selected district's name and numbers;
* a table of all districts (collapsed in a ``<details>`` element by default)
  whose column headers sort it, for screen readers and for copying;
* a plain inline script of about sixty lines, loaded from nowhere, that
  reads each district's numbers from its table row (so they are in the page
  once).

Every value is HTML-escaped in the table and copied as text
(``textContent``), never as markup, so district names cannot inject markup.
"""

from __future__ import annotations

import html
import json
from collections.abc import Sequence

import numpy as np
import pandas as pd
import shapely

from .errors import InputError, ParameterError

__all__ = ["explorable_map", "svg_paths"]

_SCRIPT = """
(function () {
  var root = document.getElementById(%(root)s);
  if (!root) { return; }
  var table = root.querySelector('table.explore-table');
  var tbody = table.tBodies[0];
  var heads = table.tHead.rows[0].cells;
  var rowById = {};
  Array.prototype.forEach.call(tbody.rows, function (r) { rowById[r.getAttribute('data-id')] = r; });
  var panel = root.querySelector('.explore-panel');
  var current = null;
  function show(id) {
    var r = rowById[id];
    if (!r) { return; }
    if (current) { current.classList.remove('is-selected'); }
    current = root.querySelector('path[data-id="' + CSS.escape(id) + '"]');
    if (current) { current.classList.add('is-selected'); }
    panel.querySelector('.explore-name').textContent = r.cells[0].textContent;
    var dl = panel.querySelector('dl');
    while (dl.firstChild) { dl.removeChild(dl.firstChild); }
    for (var i = 1; i < r.cells.length; i++) {
      var dt = document.createElement('dt'); dt.textContent = heads[i].textContent;
      var dd = document.createElement('dd'); dd.textContent = r.cells[i].textContent;
      dd.setAttribute('data-key', heads[i].getAttribute('data-key'));
      dl.appendChild(dt); dl.appendChild(dd);
    }
    panel.setAttribute('data-id', id);
  }
  root.querySelectorAll('path[data-id]').forEach(function (p) {
    var id = p.getAttribute('data-id');
    p.addEventListener('mouseenter', function () { show(id); });
    p.addEventListener('focus', function () { show(id); });
    p.addEventListener('click', function () { show(id); });
    p.addEventListener('keydown', function (e) {
      if (e.key === 'Enter' || e.key === ' ') { show(id); e.preventDefault(); }
    });
  });
  table.querySelectorAll('thead button').forEach(function (b) {
    b.addEventListener('click', function () {
      var col = parseInt(b.getAttribute('data-col'), 10);
      var th = b.parentNode;
      var asc = th.getAttribute('aria-sort') !== 'ascending';
      table.querySelectorAll('thead th').forEach(function (h) { h.removeAttribute('aria-sort'); });
      th.setAttribute('aria-sort', asc ? 'ascending' : 'descending');
      var rows = Array.prototype.slice.call(tbody.rows);
      rows.sort(function (a, b2) {
        var ca = a.cells[col], cb = b2.cells[col];
        var x = ca.hasAttribute('data-sort') ? ca.getAttribute('data-sort') : ca.textContent;
        var y = cb.hasAttribute('data-sort') ? cb.getAttribute('data-sort') : cb.textContent;
        var nx = parseFloat(x), ny = parseFloat(y), d;
        if (!isNaN(nx) && !isNaN(ny)) { d = nx - ny; } else { d = x < y ? -1 : (x > y ? 1 : 0); }
        return asc ? d : -d;
      });
      rows.forEach(function (r) { tbody.appendChild(r); });
    });
  });
  var first = root.getAttribute('data-initial') || (tbody.rows.length ? tbody.rows[0].getAttribute('data-id') : null);
  if (first) { show(first); }
})();
"""


def svg_paths(geometries, *, width: float = 640.0, precision: int = 1, simplify: float | None = None):
    """SVG path data (``d`` attributes) for polygons, fitted into a box ``width`` wide.

    Parameters
    ----------
    geometries : GeoSeries or array of shapely geometries
        Projected polygons (y grows northwards).
    width : float, default=640
        Width of the SVG coordinate box; the height follows the aspect ratio.
    precision : int, default=1
        Decimals kept in the path coordinates.
    simplify : float, optional
        Douglas-Peucker tolerance in SVG units (default: half a unit), keeping
        topology per polygon; shrinks large boundary files.

    Returns
    -------
    paths : list of str
    size : (width, height)

    Examples
    --------
    >>> from shapely.geometry import box
    >>> d, size = svg_paths([box(0, 0, 2, 1)], width=100)
    >>> d[0], size
    ('M100.0,50.0L100.0,0.0L0.0,0.0L0.0,50.0Z', (100.0, 50.0))
    """
    g = np.asarray(geometries, dtype=object)
    if not len(g):
        raise InputError("svg_paths needs at least one geometry.")
    minx, miny, maxx, maxy = shapely.total_bounds(g)
    span = max(maxx - minx, 1e-12)
    scale = width / span
    height = float(round((maxy - miny) * scale, precision)) or 1.0
    tol = 0.5 if simplify is None else float(simplify)
    moved = shapely.transform(g, lambda xy: np.c_[(xy[:, 0] - minx) * scale, (maxy - xy[:, 1]) * scale])
    if tol > 0:
        moved = shapely.simplify(moved, tol, preserve_topology=True)
    # all rings of all polygons at once: coordinates -> "x,y" strings -> one "M...Z" per ring -> one path per area
    parts, part_area = shapely.get_parts(moved, return_index=True)
    poly = shapely.get_type_id(parts) == 3
    parts, part_area = parts[poly], part_area[poly]
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    coords, coord_ring = shapely.get_coordinates(rings, return_index=True)
    last = np.r_[coord_ring[1:] != coord_ring[:-1], True]  # the closing point repeats the first: drop it
    coords, coord_ring = coords[~last], coord_ring[~last]
    fmt = f"%.{int(precision)}f"
    xy = np.char.add(np.char.add(np.char.mod(fmt, np.round(coords[:, 0], precision)), ","),
                     np.char.mod(fmt, np.round(coords[:, 1], precision)))
    counts = np.bincount(coord_ring, minlength=len(rings))
    keep = counts >= 3
    ring_text = np.array(["M" + "L".join(seg) + "Z" for seg in np.split(xy.tolist(), np.cumsum(counts)[:-1])],
                         dtype=object) if len(rings) else np.array([], dtype=object)
    ring_area = part_area[ring_part]
    out = [""] * len(g)
    order = np.argsort(ring_area[keep], kind="stable")
    areas_k = ring_area[keep][order]
    texts_k = ring_text[keep][order]
    bounds = np.searchsorted(areas_k, np.arange(len(g) + 1))
    for i in np.flatnonzero(np.diff(bounds)):
        out[i] = "".join(texts_k[bounds[i]:bounds[i + 1]])
    return out, (float(width), height)


def explorable_map(
    gdf,
    columns: Sequence[tuple[str, str]],
    *,
    text: pd.DataFrame,
    sort_values: pd.DataFrame | None = None,
    fill: Sequence[str],
    name_column: str = "area_name",
    element_id: str = "explore",
    title: str = "Explore the districts",
    hint: str = "Point at, tap or tab to a district to see its numbers.",
    table_summary: str = "All districts (table)",
    name_label: str = "District",
    legend: Sequence[tuple[str, str]] = (),
    marked=None,
    initial=None,
    width: float = 640.0,
) -> str:
    """HTML fragment: an inline SVG map whose districts show their numbers on hover, tap or focus.

    Parameters
    ----------
    gdf : GeoDataFrame
        Boundaries (projected), index = district ids, with ``name_column``.
    columns : sequence of (key, label)
        The numbers to show, in order; ``text`` has a column per key.
    text : DataFrame
        Display text per district and key (already formatted and suppressed
        where the page suppresses), index aligned with ``gdf``.
    sort_values : DataFrame, optional
        Values the table sorts by (numbers where the text is a number);
        default the text.
    fill : sequence of str
        CSS colour per district (e.g. its map class).
    name_column : str, default="area_name"
    element_id : str, default="explore"
        id of the wrapping element (must be unique in the page).
    title, hint, table_summary, name_label : str
        Visible texts (from the page's string catalogue).
    legend : sequence of (colour, label)
        Legend entries shown under the map.
    marked : boolean mask, optional
        Districts drawn with a thick outline (e.g. flagged ones).
    initial : district id, optional
        District shown in the panel when the page opens (default the first).
    width : float, default=640
        Width of the SVG coordinate box (it scales to the page width).

    Returns
    -------
    str
        HTML (a ``<section>``) with the SVG, the panel, the collapsed table
        and the script.

    Notes
    -----
    Works with no network: nothing is loaded from outside the page. The
    script only reads the JSON block and writes text nodes; with scripts
    switched off, the collapsed table still holds every number.

    Examples
    --------
    >>> import geopandas as gpd, pandas as pd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame({"area_name": ["Ashby"]}, geometry=[box(0, 0, 1, 1)], index=["D1"])
    >>> frag = explorable_map(g, [("observed", "Observed")], text=pd.DataFrame({"observed": ["4"]}, index=["D1"]),
    ...                       fill=["#ccc"])
    >>> 'data-id="D1"' in frag and "<script>" in frag
    True
    """
    func = "explorable_map"
    columns = [(str(k), str(lab)) for k, lab in columns]
    keys = [k for k, _ in columns]
    missing = [k for k in keys if k not in text.columns]
    if missing:
        raise InputError(f"{func}: the text table has no column(s) {', '.join(missing)}.")
    if not text.index.equals(gdf.index):
        raise InputError(f"{func}: the text table's index must equal the boundaries' index (same ids, same order).")
    if len(fill) != len(gdf):
        raise ParameterError(f"The 'fill' parameter of {func} must have one colour per district. "
                             f"Got {len(fill)} for {len(gdf)} districts instead.")
    sort_values = text if sort_values is None else sort_values.reindex(index=gdf.index)
    marked = np.zeros(len(gdf), bool) if marked is None else np.asarray(marked, bool)
    names = gdf[name_column].astype(str) if name_column in gdf.columns else pd.Series(
        gdf.index.astype(str), index=gdf.index)
    ids = [str(i) for i in gdf.index]
    # whole SVG units are enough detail at display size for large regions and keep the page small
    paths, (w, h) = svg_paths(gdf.geometry, width=width, precision=1 if len(gdf) <= 2000 else 0)
    esc = html.escape
    rid = esc(element_id)

    svg = [f'<svg class="explore-svg" viewBox="0 0 {w:g} {h:g}" role="group" '
           f'aria-label="{esc(title)}" xmlns="http://www.w3.org/2000/svg">']
    order = np.argsort(marked, kind="stable")  # marked districts last, so their outline is on top
    name_list = names.tolist()
    for i in order:
        cls = "district is-marked" if marked[i] else "district"
        nm = esc(name_list[i])
        svg.append(f'<path class="{cls}" d="{paths[i]}" fill="{esc(str(fill[i]))}" data-id="{esc(ids[i])}" '
                   f'tabindex="0" role="button" aria-label="{nm}"><title>{nm}</title></path>')
    svg.append("</svg>")

    legend_html = "".join(
        f'<li><span class="swatch" style="background:{esc(c)}"></span>{esc(lab)}</li>' for c, lab in legend)
    head = "".join(
        f'<th scope="col" data-key="{esc(k)}"><button type="button" data-col="{j + 1}">{esc(lab)}</button></th>'
        for j, (k, lab) in enumerate(columns))

    def sort_attr(v) -> str:
        if isinstance(v, int | float | np.integer | np.floating):
            return "" if not np.isfinite(v) else f"{float(v):.7g}"
        return str(v)

    # column-wise: escaped cell texts and sort keys per column, then one row string per district
    text_cols = [[esc(str(v)) for v in text[k].tolist()] for k in keys]
    sort_cols = [[esc(sort_attr(v)) for v in sort_values[k].tolist()] for k in keys]
    name_esc = [esc(v) for v in names.tolist()]
    body = [
        f'<tr data-id="{esc(rid_)}"><th scope="row">{name_esc[i]}</th>'
        + "".join(f"<td>{tc[i]}</td>" if sc[i] == tc[i] else f'<td data-sort="{sc[i]}">{tc[i]}</td>'
                  for tc, sc in zip(text_cols, sort_cols)) + "</tr>"
        for i, rid_ in enumerate(ids)
    ]
    return "\n".join([
        f'<section class="explore" id="{rid}" aria-labelledby="{rid}-title"'
        + (f' data-initial="{esc(str(initial))}">' if initial is not None else ">"),
        f'<h2 id="{rid}-title">{esc(title)}</h2>',
        f'<p class="explore-hint">{esc(hint)}</p>',
        '<div class="explore-body">',
        f'<div class="explore-map">{"".join(svg)}<ul class="explore-legend">{legend_html}</ul></div>',
        '<div class="explore-panel" aria-live="polite"><h3 class="explore-name"></h3><dl></dl></div>',
        "</div>",
        f"<details class=\"explore-details\"><summary>{esc(table_summary)}</summary>",
        '<div class="table-wrap"><table class="explore-table">',
        f'<thead><tr><th scope="col"><button type="button" data-col="0">{esc(name_label)}</button></th>'
        f"{head}</tr></thead>",
        f"<tbody>{''.join(body)}</tbody></table></div></details>",
        f"<script>{_SCRIPT % {'root': json.dumps(element_id)}}</script>",
        "</section>",
    ])
