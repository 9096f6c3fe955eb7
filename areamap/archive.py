"""History archive: every period's per-district bulletin results in one SQLite file.

The weekly bulletin compares this period's hotspot flags with the previous
period's (new, continuing, resolved) and counts how many consecutive periods
each district has been flagged. Those comparisons need the past, which lives
in a small SQLite database, :class:`HistoryArchive`.

Design
------
* One row per area per period (table ``area_results``, primary key
  ``(period, area_id)``) plus one row per period (table ``periods``) and a
  ``schema_version`` table so that a future areamap can refuse, with a clear
  message, an archive it does not understand.
* The period key is the ISO week that ends the analysed window
  (``"2026-W47"``); consecutive periods are consecutive ISO weeks, also when
  the bulletin uses a rolling window of several weeks.
* A run writes its period in one ``BEGIN IMMEDIATE`` transaction that first
  deletes the period and then inserts it again: re-running a period replaces
  it, and a half-written period is never visible. Two runs writing at once do
  not corrupt the file: the second waits up to ``timeout`` seconds for the
  write lock and then fails with an :class:`~areamap.errors.ArchiveError`.
* Reading never creates the file: a bad run (which fails before writing)
  leaves the archive exactly as it was.
* Two-phase publishing (schema version 2): the bulletin first *stages* a
  period (:meth:`HistoryArchive.stage_period`, tables ``pending_periods`` and
  ``pending_area_results``, invisible to every reader), then moves its output
  folder into place, then *promotes* the staged rows into the history in one
  transaction (:meth:`HistoryArchive.promote_period`) and verifies them
  (:meth:`HistoryArchive.verify_period`). A run interrupted between the two
  phases leaves a staged entry tagged with its run id; the next run completes
  it when the published folder carries that run id, and discards it otherwise
  (:meth:`HistoryArchive.pending`). Version-1 archives are upgraded in place on
  the next write.
* File permissions of an existing archive are kept (SQLite writes in place).

Cautions
--------
``weeks_flagged`` and the new/continuing/resolved status are stored as
computed when a period was written. Re-running an *earlier* period does not
recompute the periods written after it; re-run those too when that matters.
"""

from __future__ import annotations

import datetime as _dt
import json
import sqlite3
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ._params import check_interval, check_positive_int
from .errors import ArchiveError, ParameterError, format_examples
from .intake import parse_week, week_bounds, weeks_ending

__all__ = ["HistoryArchive", "FlagChanges", "SCHEMA_VERSION", "ARCHIVE_COLUMNS"]

#: Version of the table layout written by this areamap; bumped on incompatible changes.
SCHEMA_VERSION = 3

#: Older layouts this areamap reads, and upgrades in place on the next write.
_UPGRADABLE = (1, 2)

#: Per-area columns added by a schema version (added to older archives in place when written to).
_ADDED_COLUMNS: dict[int, dict[str, str]] = {
    3: {"week_observed": "INTEGER", "week_expected": "REAL", "week_rr": "REAL", "week_p_above_1": "REAL",
        "forecast_mean": "REAL", "forecast_low": "REAL", "forecast_high": "REAL", "forecast_q": "REAL",
        "emerging": "INTEGER", "persistent": "INTEGER"},
}

#: Per-area columns kept for each period, with their SQLite types.
ARCHIVE_COLUMNS: dict[str, str] = {
    "area_name": "TEXT",
    "observed": "INTEGER",
    "expected": "REAL",
    "population": "REAL",
    "sir": "REAL",
    "sir_low": "REAL",
    "sir_high": "REAL",
    "eb_rr": "REAL",
    "rr": "REAL",
    "rr_low": "REAL",
    "rr_high": "REAL",
    "p_above_1": "REAL",
    "cluster": "TEXT",
    "cluster_p": "REAL",
    "flag": "INTEGER",
    "flag_reason": "TEXT",
    "flag_change": "TEXT",
    "weeks_flagged": "INTEGER",
    **_ADDED_COLUMNS[3],
}

# Per-period fields after the period key (shared by the history and the staging table).
_PERIOD_FIELDS = """period_start TEXT NOT NULL,
    period_end TEXT NOT NULL,
    window_weeks INTEGER NOT NULL,
    written_at TEXT NOT NULL,
    tool_version TEXT,
    n_areas INTEGER NOT NULL,
    n_flagged INTEGER NOT NULL"""

_SCHEMA = f"""
CREATE TABLE IF NOT EXISTS schema_version (
    version INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS periods (
    period TEXT PRIMARY KEY,
    {_PERIOD_FIELDS}
);
CREATE TABLE IF NOT EXISTS area_results (
    period TEXT NOT NULL REFERENCES periods(period) ON DELETE CASCADE,
    area_id TEXT NOT NULL,
    {", ".join(f"{c} {t}" for c, t in ARCHIVE_COLUMNS.items())},
    PRIMARY KEY (period, area_id)
);
CREATE INDEX IF NOT EXISTS area_results_area ON area_results(area_id, period);
"""

# Staged (not yet published) periods: same columns plus the run that staged them and its output folder.
_PENDING_SCHEMA = f"""
CREATE TABLE IF NOT EXISTS pending_periods (
    run_id TEXT PRIMARY KEY,
    period TEXT NOT NULL,
    {_PERIOD_FIELDS},
    out_dir TEXT,
    settings TEXT,
    series TEXT
);
CREATE TABLE IF NOT EXISTS pending_area_results (
    run_id TEXT NOT NULL REFERENCES pending_periods(run_id) ON DELETE CASCADE,
    period TEXT NOT NULL,
    area_id TEXT NOT NULL,
    {", ".join(f"{c} {t}" for c, t in ARCHIVE_COLUMNS.items())},
    PRIMARY KEY (run_id, area_id)
);
"""

# Added without a schema bump: created on demand, absent from archives written before it (their periods
# then carry only window_weeks, which the periods table always had).
_SETTINGS_SCHEMA = """
CREATE TABLE IF NOT EXISTS period_settings (
    period TEXT PRIMARY KEY,
    series TEXT NOT NULL,
    settings TEXT NOT NULL
)
"""


# ----------------------------------------------------------------------------- ISO weeks
def _week_key(period: str) -> str:
    """Canonical ISO week key ``'YYYY-Www'``; ArchiveError when malformed."""
    try:
        return parse_week(period)
    except ParameterError:
        raise ArchiveError(
            f"Archive period keys are ISO weeks such as '2026-W47'. Got {period!r} instead."
        ) from None


def _previous_week(period: str) -> str:
    return weeks_ending(period, 2)[0]


# ----------------------------------------------------------------------------- results
@dataclass(frozen=True)
class FlagChanges:
    """How this period's flags compare with the previous period's.

    Attributes
    ----------
    period : str
        The period being compared (ISO week key).
    previous_period : str
        The ISO week before ``period``.
    previous_available : bool
        Whether ``previous_period`` is in the archive. When it is not, every
        flag counts as new and ``weeks_flagged`` restarts at 1.
    status : pandas.Series
        Per area (index = area ids, order of the current flags): ``"new"``,
        ``"continuing"``, ``"resolved"`` or ``"not flagged"``.
    weeks_flagged : pandas.Series
        Per area: consecutive periods flagged up to and including ``period``
        (0 when not flagged now).
    """

    period: str
    previous_period: str
    previous_available: bool
    status: pd.Series
    weeks_flagged: pd.Series

    @property
    def counts(self) -> dict[str, int]:
        """Number of flagged (total), new, continuing and resolved areas."""
        s = self.status
        return {
            "total": int(s.isin(["new", "continuing"]).sum()),
            "new": int((s == "new").sum()),
            "continuing": int((s == "continuing").sum()),
            "resolved": int((s == "resolved").sum()),
        }

    def to_frame(self) -> pd.DataFrame:
        """Table with columns ``flag_change`` and ``weeks_flagged`` (index = area ids)."""
        return pd.DataFrame({"flag_change": self.status, "weeks_flagged": self.weeks_flagged})

    def summary(self) -> str:
        """One line such as ``'3 flagged (1 new, 2 continuing), 1 resolved since 2026-W46'``."""
        c = self.counts
        since = (
            f"since {self.previous_period}"
            if self.previous_available
            else f"({self.previous_period} is not in the archive; all flags counted as new)"
        )
        return (
            f"{c['total']} flagged ({c['new']} new, {c['continuing']} continuing), "
            f"{c['resolved']} resolved {since}"
        )

    def _repr_html_(self) -> str:
        return f"<p>{_html_escape(self.summary())}</p>"


def _html_escape(text: str) -> str:
    import html

    return html.escape(text, quote=True)


# ----------------------------------------------------------------------------- archive
class HistoryArchive:
    """SQLite archive of per-district bulletin results, one period at a time.

    Parameters
    ----------
    path : str or Path
        The archive file. It is created (with its folder) on the first write;
        reading a missing archive gives empty results and creates nothing.
    timeout : float, default=30.0
        Seconds a writer waits for another writer to finish before failing
        with :class:`~areamap.errors.ArchiveError`.

    Notes
    -----
    Each write is one ``BEGIN IMMEDIATE`` transaction: SQLite takes the write
    lock at the start, so two bulletins run at once are serialised (the second
    waits) instead of interleaving, and a crash mid-write leaves the previous
    state (SQLite's rollback journal).

    Examples
    --------
    >>> import tempfile, pandas as pd
    >>> tmp = tempfile.mkdtemp()
    >>> arch = HistoryArchive(f"{tmp}/history.sqlite")
    >>> arch.periods()
    []
    >>> week1 = pd.DataFrame({"area_name": ["Ashby", "Brook"], "flag": [True, False]},
    ...                      index=pd.Index(["A", "B"], name="area_id"))
    >>> arch.write_period("2026-W46", week1)
    >>> week2 = pd.DataFrame({"area_name": ["Ashby", "Brook"], "flag": [True, True]},
    ...                      index=pd.Index(["A", "B"], name="area_id"))
    >>> ch = arch.compare("2026-W47", week2["flag"])
    >>> ch.status.tolist(), ch.weeks_flagged.tolist()
    (['continuing', 'new'], [2, 1])
    """

    def __init__(self, path: str | Path, *, timeout: float = 30.0) -> None:
        self.path = Path(path)
        self.timeout = check_interval(timeout, "timeout", "HistoryArchive", low=0, closed="left")

    def __repr__(self) -> str:
        return f"HistoryArchive({str(self.path)!r})"

    # ------------------------------------------------------------ connections
    def _connect(self, *, readonly: bool) -> sqlite3.Connection:
        try:
            if readonly:
                uri = self.path.resolve().as_uri() + "?mode=ro"
                con = sqlite3.connect(uri, uri=True, timeout=self.timeout, isolation_level=None)
            else:
                self.path.parent.mkdir(parents=True, exist_ok=True)
                con = sqlite3.connect(self.path, timeout=self.timeout, isolation_level=None)
            con.execute("PRAGMA foreign_keys = ON")
            con.execute(f"PRAGMA busy_timeout = {int(self.timeout * 1000)}")
        except (sqlite3.Error, OSError) as exc:
            raise ArchiveError(
                f"Cannot open the history archive {self.path}: {exc}. Check the path in "
                "[output] archive and that the folder is writable."
            ) from None
        return con

    @contextmanager
    def _reading(self) -> Iterator[sqlite3.Connection | None]:
        """A read-only connection, or None when the archive file does not exist yet."""
        if not self.path.exists():
            yield None
            return
        con = self._connect(readonly=True)
        try:
            self._check_schema(con, allow_empty=True)
            yield con
        except sqlite3.OperationalError as exc:
            raise self._locked_or_broken(exc) from None
        except sqlite3.DatabaseError as exc:
            raise self._corrupt(exc) from None
        finally:
            con.close()

    def _locked_or_broken(self, exc: sqlite3.Error) -> ArchiveError:
        text = str(exc)
        if "locked" in text or "busy" in text:
            return ArchiveError(
                f"The history archive {self.path} is locked by another run (waited "
                f"{self.timeout:g} s). Wait for the other bulletin to finish and run again."
            )
        return self._corrupt(exc)

    def _corrupt(self, exc: sqlite3.Error) -> ArchiveError:
        return ArchiveError(
            f"The history archive {self.path} cannot be read ({exc}). It may be damaged or "
            "not an areamap archive; restore it from a backup or point [output] archive "
            "at a new file."
        )

    def _check_schema(self, con: sqlite3.Connection, *, allow_empty: bool) -> bool:
        """True when the schema exists and matches; ArchiveError when foreign."""
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if not tables and allow_empty:
            return False
        if "schema_version" not in tables:
            raise ArchiveError(
                f"{self.path} is an SQLite file but not an areamap history archive (no "
                "schema_version table). Point [output] archive at a new file."
            )
        row = con.execute("SELECT version FROM schema_version").fetchone()
        if row is not None and row[0] in _UPGRADABLE:
            return True
        if row is None or row[0] != SCHEMA_VERSION:
            found = None if row is None else row[0]
            raise ArchiveError(
                f"The history archive {self.path} has schema version {found}, but this areamap "
                f"reads version {SCHEMA_VERSION}. Use a matching areamap version or a new archive file."
            )
        return True

    # ------------------------------------------------------------------ write
    def write_period(
        self,
        period: str,
        results: pd.DataFrame,
        *,
        period_start: str | _dt.date | None = None,
        period_end: str | _dt.date | None = None,
        window_weeks: int = 1,
        tool_version: str | None = None,
        before_commit: Callable[[], None] | None = None,
        settings: dict | None = None,
        series: str = "",
    ) -> None:
        """Store (or replace) one period's per-area results in a single transaction.

        Parameters
        ----------
        period : str
            ISO week key of the period (the last week of the window), e.g. ``"2026-W47"``.
        results : pandas.DataFrame
            One row per area, indexed by area id; columns among
            :data:`ARCHIVE_COLUMNS` (others are ignored, missing ones stored as NULL).
            ``flag`` is required.
        period_start, period_end : str or date, optional
            First and last day of the analysed window (default: the Monday of the
            first week and the Sunday of ``period``).
        window_weeks : int, default=1
            Length of the analysed window in weeks.
        tool_version : str, optional
            Version of areamap that produced the results (provenance).
        settings : dict, optional
            The settings the period was analysed with (window, model, flag
            rule; JSON-serialisable), checked by :meth:`check_settings`.
        series : str, default=""
            Name of the series the period belongs to (recorded with the settings).
        before_commit : callable, optional
            Called with no arguments while the write lock is held, just before
            COMMIT (the bulletin moves its output folder into place here, so
            two runs publish one after the other). If it raises, the
            transaction is rolled back and the error propagates.

        Raises
        ------
        ArchiveError
            If the archive is locked longer than ``timeout``, damaged, from an
            incompatible version, or ``results`` repeats area ids or lacks ``flag``.
        """
        staged = self._prepare(period, results, period_start=period_start, period_end=period_end,
                               window_weeks=window_weeks, tool_version=tool_version)
        with self._transaction() as con:
            self._ensure_schema(con)
            self._replace_period(con, staged)
            _store_settings(con, staged["key"], None if settings is None else json.dumps(settings, sort_keys=True),
                            series)
            if before_commit is not None:
                before_commit()

    # ------------------------------------------------------------ two-phase publishing
    def stage_period(
        self,
        period: str,
        results: pd.DataFrame,
        *,
        run_id: str,
        out_dir: str | Path | None = None,
        period_start: str | _dt.date | None = None,
        period_end: str | _dt.date | None = None,
        window_weeks: int = 1,
        tool_version: str | None = None,
        settings: dict | None = None,
        series: str = "",
    ) -> None:
        """Phase 1 of publishing: store a period as *pending* (invisible to readers) under ``run_id``.

        Parameters are those of :meth:`write_period`, plus ``run_id`` (unique per
        run; the bulletin writes it into the folder it publishes) and the output
        folder the run publishes to (used to recover an interrupted run).
        Nothing in the history changes until :meth:`promote_period`.
        """
        if not isinstance(run_id, str) or not run_id:
            raise ParameterError(f"The 'run_id' parameter of stage_period must be a non-empty string. Got {run_id!r} instead.")
        staged = self._prepare(period, results, period_start=period_start, period_end=period_end,
                               window_weeks=window_weeks, tool_version=tool_version)
        cols = ["run_id", "period", "area_id", *ARCHIVE_COLUMNS]
        insert = f"INSERT INTO pending_area_results ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})"
        with self._transaction() as con:
            self._ensure_schema(con)
            con.execute("DELETE FROM pending_periods WHERE run_id = ?", (run_id,))
            con.execute(
                "INSERT INTO pending_periods VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (run_id, staged["key"], staged["start"], staged["end"], staged["window_weeks"],
                 staged["written_at"], staged["tool_version"], staged["n"], staged["flagged"],
                 None if out_dir is None else str(out_dir),
                 None if settings is None else json.dumps(settings, sort_keys=True), str(series)),
            )
            con.executemany(insert, [(run_id, *row) for row in staged["rows"]])

    def promote_period(self, run_id: str) -> str:
        """Phase 2 of publishing: move a staged period into the history (replacing that period), atomically.

        Returns
        -------
        str
            The period key.

        Raises
        ------
        ArchiveError
            When nothing is staged under ``run_id`` (already promoted or discarded), or the archive is locked.
        """
        with self._transaction() as con:
            self._ensure_schema(con)
            row = con.execute("SELECT period, period_start, period_end, window_weeks, written_at, tool_version, "
                              "n_areas, n_flagged, settings, series FROM pending_periods WHERE run_id = ?",
                              (run_id,)).fetchone()
            if row is None:
                raise ArchiveError(f"No staged period for run {run_id} in the history archive {self.path}.")
            key, settings_json, series = row[0], row[8], row[9]
            row = row[:8]
            _store_settings(con, key, settings_json, series or "")
            cols = ", ".join(["period", "area_id", *ARCHIVE_COLUMNS])
            con.execute("DELETE FROM area_results WHERE period = ?", (key,))
            con.execute("DELETE FROM periods WHERE period = ?", (key,))
            con.execute("INSERT INTO periods VALUES (?, ?, ?, ?, ?, ?, ?, ?)", row)
            con.execute(f"INSERT INTO area_results ({cols}) SELECT {cols} FROM pending_area_results "
                        "WHERE run_id = ? ORDER BY rowid", (run_id,))
            con.execute("DELETE FROM pending_area_results WHERE run_id = ?", (run_id,))
            con.execute("DELETE FROM pending_periods WHERE run_id = ?", (run_id,))
        return key

    def discard_pending(self, run_id: str) -> bool:
        """Drop a staged period (the run did not publish). Returns whether anything was staged."""
        if not self.path.exists():
            return False
        with self._transaction() as con:
            if not self._ensure_schema(con, create=False):
                return False
            n = con.execute("DELETE FROM pending_periods WHERE run_id = ?", (run_id,)).rowcount
            con.execute("DELETE FROM pending_area_results WHERE run_id = ?", (run_id,))
        return n > 0

    def pending(self) -> pd.DataFrame:
        """Staged, unpublished periods (``run_id``, ``period``, ``written_at``, ``out_dir``), oldest first."""
        cols = ["run_id", "period", "written_at", "out_dir"]
        with self._reading() as con:
            if con is None or con.execute("SELECT 1 FROM sqlite_master WHERE type='table' "
                                          "AND name='pending_periods'").fetchone() is None:
                return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
            return pd.read_sql_query(f"SELECT {', '.join(cols)} FROM pending_periods ORDER BY written_at", con)

    def verify_period(self, period: str, n_areas: int) -> None:
        """Re-open the archive by its path and check that ``period`` is there with ``n_areas`` rows.

        Raises
        ------
        ArchiveError
            When the file is gone (for example deleted during the run), unreadable, or lacks the period.
        """
        key = _week_key(period)
        if not self.path.is_file():
            raise ArchiveError(
                f"The history archive {self.path} disappeared while the period {key} was being written "
                "(was it deleted or moved?)."
            )
        with self._reading() as con:
            ok = con is not None and _has_tables(con)
            found = con.execute("SELECT n_areas FROM periods WHERE period = ?", (key,)).fetchone() if ok else None
            rows = (con.execute("SELECT COUNT(*) FROM area_results WHERE period = ?", (key,)).fetchone()[0]
                    if found else 0)
        if found is None or found[0] != n_areas or rows != n_areas:
            raise ArchiveError(
                f"The history archive {self.path} does not hold the period {key} just written "
                f"({rows} of {n_areas} district rows found); it was changed or replaced during the run."
            )

    # ------------------------------------------------------------ write helpers
    def _prepare(self, period, results, *, period_start, period_end, window_weeks, tool_version) -> dict:
        key = _week_key(period)
        monday = week_bounds(key)[0]
        window_weeks = check_positive_int(window_weeks, "window_weeks", "HistoryArchive.write_period")
        if "flag" not in results.columns:
            raise ArchiveError("Results written to the archive need a 'flag' column (True/False).")
        ids = results.index.astype(str)
        if not ids.is_unique:
            dup = ids[ids.duplicated()].unique()
            raise ArchiveError(
                f"Results for {key} repeat {len(dup)} area id(s) ({format_examples(dup)}); "
                "each area must appear once per period."
            )
        start = period_start or (monday - _dt.timedelta(days=7 * (window_weeks - 1)))
        end = period_end or (monday + _dt.timedelta(days=6))
        return {
            "key": key, "start": str(start), "end": str(end), "window_weeks": window_weeks,
            "written_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "tool_version": tool_version, "n": len(ids),
            "flagged": int(np.asarray(results["flag"], dtype=bool).sum()),
            "rows": _rows_for_sql(key, ids, results),
        }

    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """One BEGIN IMMEDIATE ... COMMIT; rolled back on any error; SQLite errors become ArchiveError."""
        con = self._connect(readonly=False)
        try:
            con.execute("BEGIN IMMEDIATE")
            try:
                yield con
                con.execute("COMMIT")
            except BaseException:
                if con.in_transaction:
                    con.execute("ROLLBACK")
                raise
        except sqlite3.OperationalError as exc:
            raise self._locked_or_broken(exc) from None
        except sqlite3.DatabaseError as exc:
            raise self._corrupt(exc) from None
        finally:
            con.close()

    def _ensure_schema(self, con: sqlite3.Connection, *, create: bool = True) -> bool:
        """Create the tables in an empty file, upgrade an older layout; False when empty and not created."""
        if not self._check_schema(con, allow_empty=True):
            if not create:
                return False
            # executescript() would COMMIT early; run the statements one by one
            for stmt in (_SCHEMA + _PENDING_SCHEMA).split(";"):
                if stmt.strip():
                    con.execute(stmt)
            con.execute("INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,))
            return True
        version = con.execute("SELECT version FROM schema_version").fetchone()[0]
        if version != SCHEMA_VERSION:  # an upgradable older layout: add the staging tables and new columns
            for stmt in _PENDING_SCHEMA.split(";"):
                if stmt.strip():
                    con.execute(stmt)
            for table in ("area_results", "pending_area_results"):
                have = {r[1] for r in con.execute(f"PRAGMA table_info({table})")}
                for v in range(version + 1, SCHEMA_VERSION + 1):
                    for name, kind in _ADDED_COLUMNS.get(v, {}).items():
                        if name not in have:
                            con.execute(f"ALTER TABLE {table} ADD COLUMN {name} {kind}")
            con.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION,))
        return True

    def _replace_period(self, con: sqlite3.Connection, staged: dict) -> None:
        key = staged["key"]
        cols = ["period", "area_id", *ARCHIVE_COLUMNS]
        insert = f"INSERT INTO area_results ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})"
        con.execute("DELETE FROM area_results WHERE period = ?", (key,))
        con.execute("DELETE FROM periods WHERE period = ?", (key,))
        con.execute(
            "INSERT INTO periods VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (key, staged["start"], staged["end"], staged["window_weeks"], staged["written_at"],
             staged["tool_version"], staged["n"], staged["flagged"]),
        )
        con.executemany(insert, staged["rows"])

    # ---------------------------------------------------------------- settings
    def settings(self, period: str) -> dict | None:
        """The settings recorded for ``period`` (window_weeks always; the rest when recorded), or None."""
        key = _week_key(period)
        with self._reading() as con:
            if con is None or not _has_tables(con):
                return None
            row = con.execute("SELECT window_weeks FROM periods WHERE period = ?", (key,)).fetchone()
            if row is None:
                return None
            out = {"window_weeks": int(row[0])}
            has = con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'period_settings'")
            if has.fetchone():
                rec = con.execute("SELECT settings FROM period_settings WHERE period = ?", (key,)).fetchone()
                if rec is not None:
                    out.update(json.loads(rec[0]))
        return out

    def check_settings(self, period: str, settings: dict, *, series: str = "") -> None:
        """Stop when the archive's previous period was analysed with other settings.

        Compares ``settings`` with those recorded for the latest archived
        period before ``period`` (keys missing from either side are not
        compared, so archives written before settings were recorded are
        checked on the window only).

        Raises
        ------
        ArchiveError
            Naming each differing setting (archive vs this run) and the ways on:
            a new named series (``[output] series``), the archive's settings, or
            another archive file.
        """
        key = _week_key(period)
        earlier = [p for p in self.periods() if p < key]
        if not earlier:
            return
        prev = earlier[-1]
        old = self.settings(prev) or {}
        diffs = _setting_diffs(old, settings)
        if not diffs:
            return
        name = f"w{settings.get('window_weeks', 'x')}-{(settings.get('model') or {}).get('model', 'model')}"
        here = f" (series '{series}')" if series else ""
        raise ArchiveError(
            f"The history archive {self.path}{here} holds {prev}, analysed with other settings: "
            + "; ".join(f"{k}: {a} in the archive, {b} in this run" for k, a, b in diffs)
            + ". Comparing flags across different settings ('new', 'resolved', weeks in a row) would compare "
            f"unlike things. To go on, either start a new series: set [output] series = \"{name}\" (it keeps its "
            "own history file beside the archive); or run with the archive's settings; or point [output] "
            "archive to a new file."
        )

    # ------------------------------------------------------------------- read
    def periods(self) -> list[str]:
        """Archived period keys, oldest first."""
        with self._reading() as con:
            if con is None or not _has_tables(con):
                return []
            return [r[0] for r in con.execute("SELECT period FROM periods ORDER BY period")]

    def read_period(self, period: str) -> pd.DataFrame:
        """One period's per-area results (index ``area_id``); empty frame when not archived."""
        key = _week_key(period)
        with self._reading() as con:
            if con is None or not _has_tables(con):
                return _empty_results()
            frame = pd.read_sql_query(
                "SELECT * FROM area_results WHERE period = ? ORDER BY rowid", con, params=(key,)
            )
        return _tidy(frame).set_index("area_id").drop(columns="period")

    def history(self, *, area: str | Sequence[str] | None = None, last: int = 8,
                flagged_only: bool | None = None) -> pd.DataFrame:
        """Recent periods for one or more areas, or for every area flagged recently.

        Parameters
        ----------
        area : str or sequence of str, optional
            Area id(s). When omitted, every area flagged in at least one of the
            last ``last`` periods is shown.
        last : int, default=8
            Number of most recent archived periods to include.
        flagged_only : bool, optional
            Keep only the rows where the area was flagged (default: False when
            ``area`` is given, True otherwise).

        Returns
        -------
        pandas.DataFrame
            Long table sorted by area and period with columns ``period``,
            ``area_id`` and the archived columns.

        Raises
        ------
        ArchiveError
            If ``area`` names ids that are not in the archive.
        """
        last = check_positive_int(last, "last", "HistoryArchive.history")
        with self._reading() as con:
            if con is None or not _has_tables(con):
                frame = _empty_results().reset_index()
                frame.insert(0, "period", pd.Series(dtype=object))
                return frame
            keys = [r[0] for r in con.execute(
                "SELECT period FROM periods ORDER BY period DESC LIMIT ?", (last,))]
            marks = ", ".join("?" * len(keys))
            frame = pd.read_sql_query(
                f"SELECT * FROM area_results WHERE period IN ({marks})", con, params=keys
            ) if keys else pd.read_sql_query("SELECT * FROM area_results WHERE 0", con)
            known_ids = {r[0] for r in con.execute("SELECT DISTINCT area_id FROM area_results")}
        frame = _tidy(frame)
        if area is not None:
            wanted = [str(area)] if isinstance(area, str) else [str(a) for a in area]
            unknown = [a for a in wanted if a not in known_ids]
            if unknown:
                raise ArchiveError(
                    f"Area id(s) {format_examples(unknown)} are not in the history archive "
                    f"{self.path}. Use the ids of the boundaries file (column area_id of areas.csv)."
                )
            frame = frame[frame["area_id"].isin(wanted)]
            if flagged_only:
                frame = frame[frame["flag"]]
        else:
            ever = frame.loc[frame["flag"], "area_id"].unique()
            frame = frame[frame["area_id"].isin(ever)]
            if flagged_only is None or flagged_only:
                frame = frame[frame["flag"]]
        return frame.sort_values(["area_id", "period"], kind="stable").reset_index(drop=True)

    # ---------------------------------------------------------------- compare
    def compare(self, period: str, flags: pd.Series) -> FlagChanges:
        """Compare this period's flags with the previous ISO week's archived flags.

        Parameters
        ----------
        period : str
            ISO week key of the current period.
        flags : pandas.Series of bool
            Current flags indexed by area id.

        Returns
        -------
        FlagChanges
            ``status`` per area: ``"new"`` (flagged now, not in the previous
            period), ``"continuing"`` (flagged in both), ``"resolved"`` (flagged
            before, not now), ``"not flagged"``; and ``weeks_flagged``, the run
            of consecutive flagged weeks ending now, read from the archive.

        Notes
        -----
        The previous period is the ISO week just before ``period``. A week
        missing from the archive breaks a run: the count restarts, because an
        unarchived week cannot be known to have been flagged.
        """
        key = _week_key(period)
        prev = _previous_week(key)
        current = pd.Series(np.asarray(flags, dtype=bool), index=flags.index.astype(str))
        # runs[area] = consecutive flagged weeks ending at `prev`, from the archive
        runs = pd.Series(0, index=current.index, dtype=np.int64)
        available = False
        with self._reading() as con:
            if con is not None and _has_tables(con):
                available = con.execute(
                    "SELECT 1 FROM periods WHERE period = ?", (prev,)).fetchone() is not None
                if available:
                    runs = self._runs_ending(con, prev, current.index)
        was_flagged = runs > 0
        status = pd.Series("not flagged", index=current.index, dtype=object)
        status[current & ~was_flagged] = "new"
        status[current & was_flagged] = "continuing"
        status[~current & was_flagged] = "resolved"
        weeks = pd.Series(np.where(current, runs + 1, 0), index=current.index, dtype=np.int64)
        # keep the caller's index labels (not stringified) for alignment
        status.index = flags.index
        weeks.index = flags.index
        return FlagChanges(key, prev, available, status, weeks)

    def _runs_ending(self, con: sqlite3.Connection, last_key: str, ids: pd.Index) -> pd.Series:
        """Consecutive archived flagged weeks ending at ``last_key`` for each id (vectorised per week)."""
        archived = {r[0] for r in con.execute("SELECT period FROM periods WHERE period <= ?", (last_key,))}
        runs = pd.Series(0, index=ids, dtype=np.int64)
        alive = pd.Series(True, index=ids)
        key = last_key
        while key in archived and alive.any():
            flagged = {r[0] for r in con.execute(
                "SELECT area_id FROM area_results WHERE period = ? AND flag = 1", (key,))}
            now = alive & ids.isin(list(flagged))
            runs[now] += 1
            alive = now
            key = _previous_week(key)
        return runs


# ----------------------------------------------------------------------------- helpers
def _store_settings(con: sqlite3.Connection, key: str, settings_json: str | None, series: str) -> None:
    """Record (or clear) the settings a period was analysed with, inside the caller's transaction."""
    con.execute(_SETTINGS_SCHEMA)
    con.execute("DELETE FROM period_settings WHERE period = ?", (key,))
    if settings_json is not None:
        con.execute("INSERT INTO period_settings VALUES (?, ?, ?)", (key, str(series), settings_json))


def _setting_diffs(old: dict, new: dict, prefix: str = "") -> list[tuple[str, object, object]]:
    """(dotted key, archive value, run value) for every setting present in both and different."""
    out = []
    for k in sorted(set(old) & set(new)):
        a, b = old[k], new[k]
        if isinstance(a, dict) and isinstance(b, dict):
            out.extend(_setting_diffs(a, b, f"{prefix}{k}."))
        elif (list(a) if isinstance(a, tuple) else a) != (list(b) if isinstance(b, tuple) else b):
            out.append((f"{prefix}{k}", a, b))
    return out


def _has_tables(con: sqlite3.Connection) -> bool:
    return con.execute(
        "SELECT 1 FROM sqlite_master WHERE type='table' AND name='area_results'").fetchone() is not None


def _py(value: object) -> object:
    """numpy / pandas scalars to plain Python for sqlite3 (NaN -> NULL)."""
    if value is None or value is pd.NA:
        return None
    if isinstance(value, np.bool_ | bool):
        return int(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating | float):
        return None if np.isnan(value) else float(value)
    return value if isinstance(value, str | int) else str(value)


def _rows_for_sql(key: str, ids: pd.Index, results: pd.DataFrame) -> list[tuple]:
    cols = []
    for c in ARCHIVE_COLUMNS:
        if c in results.columns:
            values = results[c].to_numpy(dtype=object)
            if c == "flag":
                values = np.asarray(results[c], dtype=bool).astype(object)
            cols.append(values)
        else:
            cols.append(np.full(len(results), None, dtype=object))
    return [(key, i, *(_py(v) for v in vals)) for i, *vals in zip(ids, *cols)]


def _empty_results() -> pd.DataFrame:
    frame = pd.DataFrame({c: pd.Series(dtype=object) for c in ARCHIVE_COLUMNS})
    frame.index = pd.Index([], name="area_id", dtype=object)
    return frame


def _tidy(frame: pd.DataFrame) -> pd.DataFrame:
    for c in ("flag", "emerging", "persistent"):
        if c in frame.columns:
            frame[c] = frame[c].fillna(0).astype(bool)
    return frame
