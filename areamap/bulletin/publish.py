"""Publishing a bulletin: the output folder, the archive transaction, and :func:`run_bulletin`.

:func:`run_bulletin` chains the whole job for one period:
:func:`~areamap.bulletin.analysis.analyse_period` (computing, writes nothing),
:func:`~areamap.bulletin.render.render_bulletin` into a temporary sibling
folder, then the period written to the archive in one transaction while the
folder is moved into place. A run that fails at any step leaves the previous
bulletin folder, the archive and the inputs untouched.

Disclosure caution: complementary suppression is not done; totals or
neighbouring tables may still allow a small count to be back-calculated.
"""

from __future__ import annotations

import datetime as _dt
import html
import os
import shutil
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..archive import FlagChanges, HistoryArchive
from ..errors import InputError, ParameterError, format_examples
from .analysis import Progress, _as_config, _input_files, _Steps, analyse_period
from .render import render_bulletin

__all__ = ["OUTPUT_FILES", "BulletinResult", "run_bulletin"]

#: Files a bulletin folder holds; an existing output folder is only replaced when it
#: contains nothing else.
OUTPUT_FILES = ("index.html", "areas.csv", "areas.gpkg", "run.json")


# ============================================================================ result
@dataclass(frozen=True, eq=False)
class BulletinResult:
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

    @property
    def files(self) -> dict[str, Path]:
        """Paths of the four output files."""
        return {name: self.out / name for name in OUTPUT_FILES}

    @property
    def flagged(self) -> pd.DataFrame:
        """Rows of the flagged areas (without geometry)."""
        t = self.to_frame()
        return t[t["flag"]]

    def to_frame(self) -> pd.DataFrame:
        """The per-area table without geometry (unsuppressed)."""
        return pd.DataFrame(self.areas.drop(columns="geometry"))

    def summary(self) -> str:
        """A few lines: period, flags and changes, Moran's I, where the outputs are."""
        c = self.changes.counts
        m = self.run_info["morans_i"]
        return "\n".join([
            f"Bulletin for {self.period} ({self.period_start} to {self.period_end}, "
            f"{self.window_weeks} week(s)): {len(self.areas)} districts.",
            f"Flagged: {c['total']} ({c['new']} new, {c['continuing']} continuing); "
            f"{c['resolved']} resolved since {self.changes.previous_period}"
            + ("" if self.changes.previous_available else " (not in the archive)") + ".",
            f"Global Moran's I (EB-standardized ratios): {m['statistic']:.3f} "
            f"(expected {m['expected']:.3f}, permutation p = {m['p_value']:.3g}).",
            f"Outputs: {self.out}" + (" (public: small counts suppressed)" if self.public else ""),
        ])

    def _repr_html_(self) -> str:
        lines = "".join(f"<li>{html.escape(s)}</li>" for s in self.summary().splitlines())
        return f"<ul>{lines}</ul>"


# ============================================================================ output folder
def _check_out_dir(out: Path, inputs: list[tuple[str, Path]]) -> None:
    """Refuse output folders that would overwrite anything but a previous bulletin."""
    if out.exists() and not out.is_dir():
        raise InputError(f"The output path {out} exists and is a file. Give a folder for the bulletin (--out DIR).")
    resolved = out.resolve()
    for role, p in inputs:
        try:
            Path(p).resolve().relative_to(resolved)
        except ValueError:
            continue
        raise InputError(
            f"The output folder {out} contains the {role} file {p}; a bulletin run replaces its output folder. "
            "Choose a separate output folder (--out DIR)."
        )
    if out.is_dir():
        extra = sorted(p.name for p in out.iterdir() if p.name not in OUTPUT_FILES)
        if extra:
            raise InputError(
                f"The output folder {out} holds files that are not bulletin outputs ({format_examples(extra)}). "
                "A bulletin run replaces the whole folder, so choose an empty or new folder (--out DIR), "
                "or the folder of a previous bulletin."
            )


def _publish(tmp: Path, out: Path) -> None:
    """Move the finished temporary folder into place, replacing a previous bulletin."""
    backup = None
    if out.exists():
        backup = out.parent / f".{out.name}.previous-{uuid.uuid4().hex[:8]}"
        os.replace(out, backup)
    try:
        os.replace(tmp, out)
    except OSError:
        if backup is not None:
            os.replace(backup, out)
        raise
    if backup is not None:
        shutil.rmtree(backup, ignore_errors=True)



def run_bulletin(
    config,
    *,
    period: str | None = None,
    out: str | Path | None = None,
    public: bool = False,
    progress: Progress | None = None,
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
        Output folder; default ``bulletin`` beside the configuration file. An
        existing folder is replaced only when it holds nothing but bulletin
        outputs.
    public : bool, default=False
        Suppress small counts (1 to ``suppress_below - 1``) in areas.csv and
        areas.gpkg too (the HTML always suppresses them) and withhold the
        ratios that would reveal them (sir, sir_low, sir_high, eb_rr).
    progress : callable, optional
        Called with a short message at the start of each step (the CLI prints
        them on a terminal).

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
    from .. import __version__

    t_start = time.perf_counter()
    cfg = _as_config(config, "run_bulletin")
    if not isinstance(public, bool):
        raise ParameterError(f"The 'public' parameter of run_bulletin must be True or False. Got {public!r} instead.")
    out_dir = Path(out) if out is not None else cfg.base_dir / "bulletin"
    out_dir = out_dir.expanduser().absolute()
    _check_out_dir(out_dir, [*_input_files(cfg), ("history archive", Path(cfg.output.archive))])

    analysis = analyse_period(cfg, period=period, progress=progress)
    steps = _Steps(progress, 10)
    steps.count = 8
    steps.start("outputs", "writing index.html, areas.csv, areas.gpkg, run.json")
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.tmp-", dir=_parent_for(out_dir)))
    os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes it private; the published folder follows the umask
    try:
        run_info = render_bulletin(analysis, tmp, public=public, started=t_start)

        steps.start("archive", "archiving the period and publishing")
        # the folder is moved into place while the archive's write lock is held: two runs publish in turn,
        # and a failed move rolls the archive back
        table = analysis.to_frame()
        HistoryArchive(cfg.output.archive).write_period(
            analysis.period, table, period_start=analysis.period_start, period_end=analysis.period_end,
            window_weeks=analysis.window_weeks, tool_version=__version__,
            before_commit=lambda: _publish(tmp, out_dir))
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    steps.stop()
    run_info["timings_seconds"]["archive"] = steps.timings.get("archive")
    return BulletinResult(out=out_dir, period=analysis.period, period_start=analysis.period_start,
                          period_end=analysis.period_end, window_weeks=analysis.window_weeks,
                          areas=analysis.areas, morans_i=analysis.morans_i, changes=analysis.changes,
                          car_fit=analysis.car_fit, run_info=run_info, public=public)


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _parent_for(out_dir: Path) -> Path:
    parent = out_dir.parent
    parent.mkdir(parents=True, exist_ok=True)
    return parent
