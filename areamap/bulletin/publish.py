"""Publishing a bulletin: the output folder, the archive transaction, and :func:`run_bulletin`.

:func:`run_bulletin` chains the whole job for one period:
:func:`~areamap.bulletin.analysis.analyse_period` (computing, writes nothing),
:func:`~areamap.bulletin.render.render_bulletin` into a temporary sibling
folder, then the period written to the archive in one transaction while the
folder is moved into place. A run that fails at any step leaves the previous
bulletin folder, the archive and the inputs untouched.

With ``public=True`` the files are rendered from
:func:`~areamap.bulletin.disclosure.public_analysis` (estimates computed
without the suppressed counts) and the disclosure rule of
:mod:`~areamap.bulletin.disclosure` applies; the archive always keeps the full
analysis.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import html
import os
import shutil
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path


from ..archive import FlagChanges, HistoryArchive
from ..errors import InputError, ParameterError
from . import _folder
from ._folder import MARKER_NAME, OUTPUT_FILES
from .analysis import Progress, _AreaTable, _as_config, _input_files, _summary_lines, _Steps, analyse_period
from .disclosure import public_analysis
from .render import render_bulletin

__all__ = ["OUTPUT_FILES", "MARKER_NAME", "BulletinResult", "period_folder", "point_to_latest", "run_bulletin"]



# ============================================================================ result
@dataclass(frozen=True, eq=False)
class BulletinResult(_AreaTable):
    """What one bulletin run produced.

    Attributes
    ----------
    out : pathlib.Path
        The bulletin folder (index.html, areas.csv, areas.gpkg, run.json).
    period : str
        ISO week ending the analysed window, e.g. ``"2026-W47"``.
    period_start, period_end : datetime.date
        First and last day of the window.
    window_weeks : int
    areas : geopandas.GeoDataFrame
        The per-area table (unsuppressed counts), index = area ids, columns
        :data:`AREA_COLUMNS` (except area_id, the index) plus geometry.
    morans_i : object
        The global Moran's I result of the EB-standardized ratios.
    changes : FlagChanges
        Comparison with the previous period.
    car_fit : object
        The fitted CAR model.
    run_info : dict
        The content of run.json.
    public : bool
        Whether the tables were written with small counts suppressed.
    notes : tuple of str
        What publishing found and did besides the normal swap: a followed
        symbolic link, leftovers of interrupted runs restored or removed, an
        archive entry completed or discarded.
    """

    out: Path
    period: str
    period_start: _dt.date
    period_end: _dt.date
    window_weeks: int
    areas: object
    morans_i: object
    changes: FlagChanges
    car_fit: object
    run_info: dict = field(repr=False)
    public: bool = False
    notes: tuple = ()

    @property
    def files(self) -> dict[str, Path]:
        """Paths of the four output files."""
        return {name: self.out / name for name in OUTPUT_FILES}

    def summary(self) -> str:
        """A few lines: period, flags and changes, Moran's I, where the outputs are."""
        return "\n".join([
            *_summary_lines(self, "Bulletin for"),
            f"Outputs: {self.out}" + (" (public: small counts suppressed)" if self.public else ""),
            *(f"Note: {n}" for n in self.notes),
        ])

    def _repr_html_(self) -> str:
        lines = "".join(f"<li>{html.escape(s)}</li>" for s in self.summary().splitlines())
        return f"<ul>{lines}</ul>"


# ============================================================================ output folders
def period_folder(root: str | Path, period: str) -> Path:
    """The folder of one period under an output root: ``root / "2026-W47"``.

    Examples
    --------
    >>> period_folder("out", "2026-W47").as_posix()
    'out/2026-W47'
    """
    from ..intake import parse_week

    return Path(root) / parse_week(period)


def _period_folders(root: Path) -> list[str]:
    import re

    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir()
                  if p.is_dir() and re.fullmatch(r"\d{4}-W\d{2}", p.name) and (p / "index.html").is_file())


def point_to_latest(root: str | Path) -> Path | None:
    """Write ``root/latest.html``: a page that forwards to the newest period's bulletin and lists all.

    The newest period is the largest ISO week among the period folders, so
    re-running an older period does not move the pointer. The file is
    replaced atomically. Returns its path (None when there is no period yet).
    """
    root = Path(root)
    periods = _period_folders(root)
    if not periods:
        return None
    latest = periods[-1]
    items = "".join(f'<li><a href="{html.escape(p)}/index.html">{html.escape(p)}</a></li>'
                    for p in reversed(periods))
    page = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="refresh" content="0; url={html.escape(latest)}/index.html">'
        f"<title>Latest bulletin: {html.escape(latest)}</title></head><body>"
        f'<p>Latest bulletin: <a href="{html.escape(latest)}/index.html">{html.escape(latest)}</a></p>'
        f"<h1>All periods</h1><ul>{items}</ul></body></html>\n"
    )
    target = root / "latest.html"
    tmp = root / f".latest.html.tmp-{uuid.uuid4().hex[:8]}"
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, target)
    return target


def _check_root(root: Path) -> None:
    """The output root of per-period folders must be a folder (or not exist yet); the period folder
    itself is checked like a plain output folder once the period is known."""
    if root.exists() and not root.is_dir():
        raise InputError(f"The output path {root} exists and is a file. Give a folder for the bulletin (--out DIR).")



# ============================================================================ publishing
def _publish(analysis, out_dir: Path, *, public: bool, replace_public: bool, started: float,
             steps: _Steps, inputs: list, today=None) -> tuple[dict, list[str]]:
    """Render into a temporary sibling, stage in the archive, swap the folder in, promote, verify, clean up.

    The folder and the archive change together or not at all: see :mod:`areamap.bulletin._folder` and
    :meth:`~areamap.archive.HistoryArchive.stage_period`.
    """
    from .. import __version__

    cfg = analysis.config
    archive = HistoryArchive(cfg.output.archive_path)
    notes: list[str] = []
    with _folder.publish_lock(out_dir, timeout=archive.timeout):
        notes += _recover(out_dir, archive)
        _folder.check_replaceable(out_dir, inputs, public=public, replace_public=replace_public)
        mode = _folder.folder_mode(out_dir)
        run_id = uuid.uuid4().hex
        tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.tmp-{run_id[:8]}-", dir=out_dir.parent))
        previous = out_dir.parent / f".{out_dir.name}.previous-{run_id[:8]}"
        swapped = had_previous = False
        try:
            # the replaced folder's permissions; a new folder follows the umask (mkdtemp makes it private)
            os.chmod(tmp, mode if mode is not None else 0o777 & ~_umask())
            _folder.write_marker(tmp, {"run_id": run_id, "period": analysis.period, "public": public,
                                       "version": __version__})
            # a public run publishes estimates computed without the suppressed counts (disclosure rule)
            shown = public_analysis(analysis, today=today) if public else analysis
            run_info = render_bulletin(shown, tmp, public=public, started=started)

            steps.start("archive", "archiving the period and publishing")
            table = analysis.to_frame()
            archive.stage_period(analysis.period, table, run_id=run_id, out_dir=out_dir,
                                 period_start=analysis.period_start, period_end=analysis.period_end,
                                 window_weeks=analysis.window_weeks, tool_version=__version__,
                                 settings=analysis.settings, series=cfg.output.series)
            had_previous = _folder.swap_in(tmp, out_dir, previous)
            swapped = True
            archive.promote_period(run_id)
            archive.verify_period(analysis.period, len(table))
        except BaseException:
            if swapped:
                _undo(out_dir, previous if had_previous else None, tmp)
            with contextlib.suppress(Exception):
                archive.discard_pending(run_id)
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        # committed and verified: the old folder is no longer needed
        shutil.rmtree(previous, ignore_errors=True)
    return run_info, notes


def _undo(out_dir: Path, previous: Path | None, discard: Path) -> None:
    """Put the replaced folder back (or remove a first publication) after a failed archive commit."""
    if previous is not None:
        _folder.swap_back(out_dir, previous, discard)
    elif out_dir.exists():
        os.rename(out_dir, discard)


def _recover(out_dir: Path, archive: HistoryArchive) -> list[str]:
    """Finish or undo what an interrupted run left: the output folder, leftovers, staged archive rows."""
    notes = _folder.clean_leftovers(out_dir)
    if not archive.path.exists():
        return notes
    pending = archive.pending()
    if not len(pending):
        return notes
    marker = _folder.read_marker(out_dir) if out_dir.is_dir() else None
    published_run = marker.get("run_id") if marker else None
    for row in pending.itertuples():
        if row.out_dir is None or Path(row.out_dir) != out_dir:
            continue  # another output folder's run: its own next run decides
        if row.run_id == published_run:
            archive.promote_period(row.run_id)
            notes.append(f"Completed the archive entry of {row.period}: an interrupted run had published the "
                         "folder but not yet committed the archive.")
        else:
            archive.discard_pending(row.run_id)
            notes.append(f"Discarded an unpublished archive entry of {row.period} left by an interrupted run.")
    return notes


def run_bulletin(
    config,
    *,
    period: str | None = None,
    out: str | Path | None = None,
    public: bool = False,
    replace_public: bool = False,
    progress: Progress | None = None,
    today: _dt.date | None = None,
) -> BulletinResult:
    """Run the whole bulletin for one period and publish its folder.

    Parameters
    ----------
    config : str, Path or RunConfig
        The run configuration (a TOML file path or a loaded :class:`~areamap.config.RunConfig`).
    period : str, optional
        ISO week ending the analysed window (``"2026-W47"``) or ``"latest"``;
        default ``[period] week`` of the configuration.
    out : str or Path, optional
        Output folder; default ``bulletin`` beside the configuration file.
        With ``[output] per_period = true`` (the default) each period goes
        into its own subfolder (``out/2026-W47/``) and ``out/latest.html``
        points to the newest period; otherwise the files go straight into
        ``out``. An existing (period) folder is replaced only when areamap
        wrote it (see :mod:`areamap.bulletin._folder`).
    public : bool, default=False
        Suppress small counts (1 to ``suppress_below - 1``) in areas.csv and
        areas.gpkg too (the HTML always suppresses them) and withhold the
        ratios that would reveal them (sir, sir_low, sir_high, eb_rr).
    replace_public : bool, default=False
        Allow a non-public run to replace a folder written by a public run
        (refused otherwise: it would replace suppressed tables by unsuppressed ones).
    progress : callable, optional
        Called with a short message at the start of each step (the CLI prints
        them on a terminal).
    today : datetime.date, optional
        The day of the run (default today, UTC); case weeks after it are refused
        unless ``[checks] allow_future_weeks``.

    Returns
    -------
    BulletinResult

    Raises
    ------
    AreamapError
        Unusable input or configuration (InputError, ConfigError, GraphError),
        a model that cannot be fitted (ModelError) or a locked or damaged
        archive (ArchiveError). Nothing is written or changed in that case.

    Notes
    -----
    The numbers are those of :func:`~areamap.bulletin.analysis.analyse_period`
    for the same configuration and period.

    Examples
    --------
    >>> from areamap.demo import write_demo                      # doctest: +SKIP
    >>> result = run_bulletin(write_demo("demo"), out="demo/out")  # doctest: +SKIP
    >>> print(result.summary())                                   # doctest: +SKIP
    """
    t_start = time.perf_counter()
    cfg = _as_config(config, "run_bulletin")
    if not isinstance(public, bool):
        raise ParameterError(f"The 'public' parameter of run_bulletin must be True or False. Got {public!r} instead.")
    if not isinstance(replace_public, bool):
        raise ParameterError("The 'replace_public' parameter of run_bulletin must be True or False. "
                             f"Got {replace_public!r} instead.")
    root = Path(out) if out is not None else cfg.base_dir / "bulletin"
    root, out_notes = _folder.resolve_out(root.expanduser().absolute())
    inputs = [*_input_files(cfg), ("history archive", Path(cfg.output.archive_path))]
    per_period = cfg.output.per_period
    # refuse an unusable folder before the (long) analysis; checked again under the publishing lock
    if per_period:
        _check_root(root)
    else:
        _folder.check_replaceable(root, inputs, public=public, replace_public=replace_public)

    analysis = analyse_period(cfg, period=period, progress=progress, today=today)
    out_dir = period_folder(root, analysis.period) if per_period else root
    if per_period:
        out_dir, period_notes = _folder.resolve_out(out_dir)
        out_notes += period_notes
        _folder.check_replaceable(out_dir, inputs, public=public, replace_public=replace_public)
    steps = _Steps(progress, 10)
    steps.count = 8
    steps.start("outputs", "writing index.html, areas.csv, areas.gpkg, run.json")
    _parent_for(out_dir)
    run_info, recovered = _publish(analysis, out_dir, public=public, replace_public=replace_public,
                                   started=t_start, steps=steps, inputs=inputs, today=today)
    if per_period:
        point_to_latest(root)
    steps.stop()
    run_info["timings_seconds"]["archive"] = steps.timings.get("archive")
    run_info["publishing_notes"] = [*out_notes, *recovered]
    return BulletinResult(out=out_dir, period=analysis.period, period_start=analysis.period_start,
                          period_end=analysis.period_end, window_weeks=analysis.window_weeks,
                          areas=analysis.areas, morans_i=analysis.morans_i, changes=analysis.changes,
                          car_fit=analysis.car_fit, run_info=run_info, public=public,
                          notes=tuple(run_info["publishing_notes"]))


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _parent_for(out_dir: Path) -> Path:
    parent = out_dir.parent
    parent.mkdir(parents=True, exist_ok=True)
    return parent
