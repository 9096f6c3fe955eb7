"""Tests of the SQLite history archive (areamap.archive)."""

from __future__ import annotations

import sqlite3
import threading
import time

import numpy as np
import pandas as pd
import pytest

from areamap.archive import SCHEMA_VERSION, HistoryArchive
from areamap.errors import ArchiveError, ParameterError

IDS = ["A", "B", "C", "D"]


def _frame(flags, *, observed=None) -> pd.DataFrame:
    n = len(flags)
    return pd.DataFrame(
        {
            "area_name": [f"Area {i}" for i in IDS[:n]],
            "observed": observed if observed is not None else list(range(n)),
            "expected": np.linspace(1.0, 2.0, n),
            "rr": np.linspace(0.5, 1.5, n),
            "cluster": ["not significant"] * n,
            "flag": flags,
            "flag_reason": ["P(RR>1)=0.90 >= 0.8" if f else "" for f in flags],
        },
        index=pd.Index(IDS[:n], name="area_id"),
    )


@pytest.fixture
def archive(tmp_path) -> HistoryArchive:
    return HistoryArchive(tmp_path / "history.sqlite", timeout=5.0)


def test_reading_a_missing_archive_creates_nothing(archive):
    assert archive.periods() == []
    assert archive.read_period("2026-W47").empty
    ch = archive.compare("2026-W47", pd.Series([True, False], index=["A", "B"]))
    assert not ch.previous_available
    assert ch.status.tolist() == ["new", "not flagged"]
    assert not archive.path.exists()


def test_write_and_read_round_trip(archive):
    archive.write_period("2026-W47", _frame([True, False, True, False]), tool_version="0.1.0")
    back = archive.read_period("2026-W47")
    assert back.index.tolist() == IDS
    assert back["flag"].tolist() == [True, False, True, False]
    assert back["observed"].tolist() == [0, 1, 2, 3]
    np.testing.assert_allclose(back["expected"], np.linspace(1.0, 2.0, 4), rtol=0)  # REAL round trip is exact
    assert archive.periods() == ["2026-W47"]
    with sqlite3.connect(archive.path) as con:
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
        start, end, k, n_flagged = con.execute(
            "SELECT period_start, period_end, window_weeks, n_flagged FROM periods").fetchone()
    # ISO 8601: week 47 of 2026 runs Monday 16 to Sunday 22 November 2026 (calendar, from memory)
    assert (start, end, k, n_flagged) == ("2026-11-16", "2026-11-22", 1, 2)


def test_rerunning_a_period_replaces_it(archive):
    archive.write_period("2026-W47", _frame([True, True, True, True]))
    archive.write_period("2026-W47", _frame([False, False, True, False], observed=[9, 9, 9, 9]))
    back = archive.read_period("2026-W47")
    assert len(back) == 4  # one row per area per period, not duplicated
    assert back["flag"].tolist() == [False, False, True, False]
    assert back["observed"].tolist() == [9, 9, 9, 9]
    assert archive.periods() == ["2026-W47"]


def test_failed_write_leaves_previous_state(archive):
    archive.write_period("2026-W47", _frame([True, False, False, False]))
    bad = _frame([True, True, True, True])
    bad.index = pd.Index(["A", "A", "C", "D"], name="area_id")
    with pytest.raises(ArchiveError, match="repeat 1 area id"):
        archive.write_period("2026-W47", bad)
    assert archive.read_period("2026-W47")["flag"].tolist() == [True, False, False, False]


@pytest.mark.parametrize("key", ["2026-47", "W47", "2026-W60", ""])
def test_bad_period_keys(archive, key):
    with pytest.raises(ArchiveError, match="ISO weeks such as '2026-W47'"):
        archive.write_period(key, _frame([True]))


def test_new_continuing_resolved(archive):
    # week 46: A, B flagged; week 47: B, C flagged  ->  A resolved, B continuing, C new, D never
    archive.write_period("2026-W46", _frame([True, True, False, False]))
    ch = archive.compare("2026-W47", pd.Series([False, True, True, False], index=IDS))
    assert ch.previous_available and ch.previous_period == "2026-W46"
    assert ch.status.tolist() == ["resolved", "continuing", "new", "not flagged"]
    assert ch.counts == {"total": 2, "new": 1, "continuing": 1, "resolved": 1}
    assert ch.weeks_flagged.tolist() == [0, 2, 1, 0]
    assert "1 new, 1 continuing" in ch.summary()


def test_weeks_flagged_counts_consecutive_weeks_across_a_year_end(archive):
    # ISO 2026 has 53 weeks (it starts on a Thursday; calendar, from memory): 2026-W53 precedes 2027-W01
    archive.write_period("2026-W52", _frame([True, True, False, False]))
    archive.write_period("2026-W53", _frame([True, False, True, False]))
    archive.write_period("2027-W01", _frame([True, True, True, False]))
    ch = archive.compare("2027-W02", pd.Series([True, True, True, True], index=IDS))
    # A flagged 52, 53, 01 and now -> 4; B broken at 53 -> 2; C flagged 53, 01, now -> 3; D new -> 1
    assert ch.weeks_flagged.tolist() == [4, 2, 3, 1]
    assert ch.status.tolist() == ["continuing", "continuing", "continuing", "new"]


def test_missing_week_breaks_the_run(archive):
    archive.write_period("2026-W44", _frame([True, True, True, True]))
    archive.write_period("2026-W45", _frame([True, True, True, True]))
    # 2026-W46 never run
    ch = archive.compare("2026-W47", pd.Series([True, False, True, False], index=IDS))
    assert not ch.previous_available
    assert ch.status.tolist() == ["new", "not flagged", "new", "not flagged"]
    assert ch.weeks_flagged.tolist() == [1, 0, 1, 0]
    assert "not in the archive" in ch.summary()


def test_history_of_one_area_and_of_flagged_areas(archive):
    for week, flags in [("2026-W45", [True, False, False, False]),
                        ("2026-W46", [True, True, False, False]),
                        ("2026-W47", [False, True, False, False])]:
        archive.write_period(week, _frame(flags))
    one = archive.history(area="A", last=8)
    assert one["period"].tolist() == ["2026-W45", "2026-W46", "2026-W47"]
    assert one["flag"].tolist() == [True, True, False]
    last2 = archive.history(area="A", last=2)
    assert last2["period"].tolist() == ["2026-W46", "2026-W47"]
    flagged = archive.history(last=8)
    assert set(zip(flagged["area_id"], flagged["period"])) == {
        ("A", "2026-W45"), ("A", "2026-W46"), ("B", "2026-W46"), ("B", "2026-W47")}
    with pytest.raises(ArchiveError, match="Area id.*ZZ.*not in the history archive"):
        archive.history(area="ZZ")
    with pytest.raises(ParameterError, match="'last' parameter of HistoryArchive.history"):
        archive.history(last=0)


def test_not_an_archive_and_wrong_version(tmp_path):
    other = tmp_path / "other.sqlite"
    with sqlite3.connect(other) as con:
        con.execute("CREATE TABLE something (x)")
    with pytest.raises(ArchiveError, match="not an areamap history archive"):
        HistoryArchive(other).periods()
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"this is not a database" * 100)
    with pytest.raises(ArchiveError, match="cannot be read"):
        HistoryArchive(junk).write_period("2026-W47", _frame([True]))
    arch = HistoryArchive(tmp_path / "h.sqlite")
    arch.write_period("2026-W47", _frame([True]))
    with sqlite3.connect(arch.path) as con:
        con.execute("UPDATE schema_version SET version = 999")
    with pytest.raises(ArchiveError, match="schema version 999"):
        arch.periods()


def test_second_writer_fails_clearly_while_locked(tmp_path):
    path = tmp_path / "history.sqlite"
    HistoryArchive(path).write_period("2026-W46", _frame([True, False, False, False]))
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")  # another run in the middle of its write
    try:
        with pytest.raises(ArchiveError, match="locked by another run"):
            HistoryArchive(path, timeout=0.2).write_period("2026-W47", _frame([True] * 4))
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert HistoryArchive(path).periods() == ["2026-W46"]  # untouched


def test_second_writer_waits_for_the_first(tmp_path):
    path = tmp_path / "history.sqlite"
    HistoryArchive(path).write_period("2026-W46", _frame([True, False, False, False]))
    # the holding connection is used from the releasing thread (same connection, handed over)
    holder = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    holder.execute("BEGIN IMMEDIATE")
    released = threading.Event()

    def release():
        time.sleep(0.3)
        holder.execute("ROLLBACK")
        released.set()

    t = threading.Thread(target=release)
    t.start()
    try:
        HistoryArchive(path, timeout=10.0).write_period("2026-W47", _frame([True] * 4))
    finally:
        t.join()
        holder.close()
    assert released.is_set()
    assert HistoryArchive(path).periods() == ["2026-W46", "2026-W47"]


def test_concurrent_writers_never_corrupt(tmp_path):
    """Four threads, each with its own connection, rewrite overlapping periods many times."""
    path = tmp_path / "history.sqlite"
    errors: list[BaseException] = []

    def writer(seed: int):
        rng = np.random.default_rng(seed)
        arch = HistoryArchive(path, timeout=30.0)
        try:
            for _ in range(10):
                week = f"2026-W{rng.integers(40, 44):02d}"
                arch.write_period(week, _frame(list(rng.random(4) < 0.5)))
        except BaseException as exc:  # noqa: BLE001 - collected and re-raised in the main thread
            errors.append(exc)

    threads = [threading.Thread(target=writer, args=(s,)) for s in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    with sqlite3.connect(path) as con:
        assert con.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        counts = con.execute("SELECT period, COUNT(*) FROM area_results GROUP BY period").fetchall()
        n_flagged = dict(con.execute("SELECT period, n_flagged FROM periods").fetchall())
        actual = dict(con.execute(
            "SELECT period, SUM(flag) FROM area_results GROUP BY period").fetchall())
    assert all(n == 4 for _, n in counts)  # every period complete, never doubled
    assert n_flagged == actual  # period row and area rows come from the same write


def test_failing_before_commit_rolls_back(archive):
    archive.write_period("2026-W46", _frame([True, False, False, False]))

    def fail():
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        archive.write_period("2026-W46", _frame([False, True, True, True]), before_commit=fail)
    with pytest.raises(OSError, match="disk full"):
        archive.write_period("2026-W47", _frame([False, True, True, True]), before_commit=fail)
    assert archive.periods() == ["2026-W46"]
    assert archive.read_period("2026-W46")["flag"].tolist() == [True, False, False, False]
    called = []
    archive.write_period("2026-W47", _frame([True] * 4), before_commit=lambda: called.append(1))
    assert called == [1] and archive.periods() == ["2026-W46", "2026-W47"]


def test_version_1_archive_is_read_and_upgraded_in_place(archive):
    # an archive written by the first layout (no space-time columns) stays readable and gains them on write
    from areamap.archive import _ADDED_COLUMNS, ARCHIVE_COLUMNS

    old_cols = {c: t for c, t in ARCHIVE_COLUMNS.items() if c not in _ADDED_COLUMNS[3]}
    with sqlite3.connect(archive.path) as con:
        con.execute("CREATE TABLE schema_version (version INTEGER NOT NULL)")
        con.execute("INSERT INTO schema_version VALUES (1)")
        con.execute("CREATE TABLE periods (period TEXT PRIMARY KEY, period_start TEXT NOT NULL, period_end TEXT "
                    "NOT NULL, window_weeks INTEGER NOT NULL, written_at TEXT NOT NULL, tool_version TEXT, "
                    "n_areas INTEGER NOT NULL, n_flagged INTEGER NOT NULL)")
        con.execute("CREATE TABLE area_results (period TEXT NOT NULL, area_id TEXT NOT NULL, "
                    + ", ".join(f"{c} {t}" for c, t in old_cols.items()) + ", PRIMARY KEY (period, area_id))")
        con.execute("INSERT INTO periods VALUES ('2026-W46', '2026-11-09', '2026-11-15', 1, 'x', '0.1', 1, 1)")
        con.execute("INSERT INTO area_results (period, area_id, observed, flag) VALUES ('2026-W46', 'A', 3, 1)")
    assert archive.read_period("2026-W46")["flag"].tolist() == [True]
    frame = _frame([True, False, True, False]).assign(emerging=[True, False, False, False], week_observed=[5, 0, 1, 2])
    archive.write_period("2026-W47", frame)
    with sqlite3.connect(archive.path) as con:
        assert con.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
    back = archive.read_period("2026-W47")
    assert back["emerging"].tolist() == [True, False, False, False]
    assert back["week_observed"].tolist() == [5, 0, 1, 2]
    assert archive.compare("2026-W47", frame["flag"]).weeks_flagged.loc["A"] == 2  # history kept


# ============================================================================ two-phase publishing
def test_staged_period_is_invisible_until_promoted(archive):
    archive.write_period("2026-W46", _frame([True, False, False, False]))
    archive.stage_period("2026-W47", _frame([True, True, False, False]), run_id="run-1", out_dir="/x/bulletin")
    # readers and the flag comparison see only published periods
    assert archive.periods() == ["2026-W46"]
    assert archive.read_period("2026-W47").empty
    assert archive.pending()[["run_id", "period", "out_dir"]].values.tolist() == [["run-1", "2026-W47", "/x/bulletin"]]
    assert archive.promote_period("run-1") == "2026-W47"
    assert archive.periods() == ["2026-W46", "2026-W47"] and archive.pending().empty
    assert archive.read_period("2026-W47")["flag"].tolist() == [True, True, False, False]
    archive.verify_period("2026-W47", 4)
    with pytest.raises(ArchiveError, match="No staged period for run run-1"):
        archive.promote_period("run-1")


def test_promotion_replaces_a_rerun_period_and_discard_keeps_the_old(archive):
    archive.write_period("2026-W47", _frame([False] * 4))
    archive.stage_period("2026-W47", _frame([True] * 4), run_id="r2")
    assert archive.discard_pending("r2") and not archive.discard_pending("r2")
    assert archive.read_period("2026-W47")["flag"].tolist() == [False] * 4  # untouched
    archive.stage_period("2026-W47", _frame([True] * 4), run_id="r3")
    archive.promote_period("r3")
    assert archive.read_period("2026-W47")["flag"].tolist() == [True] * 4


def test_verify_detects_a_vanished_or_incomplete_archive(archive):
    archive.write_period("2026-W47", _frame([True, False, True, False]))
    with pytest.raises(ArchiveError, match="does not hold the period 2026-W47 just written"):
        archive.verify_period("2026-W47", 5)
    archive.path.unlink()
    with pytest.raises(ArchiveError, match="disappeared"):
        archive.verify_period("2026-W47", 4)


def test_version_1_archive_is_read_and_upgraded(archive):
    archive.write_period("2026-W46", _frame([True, False, False, False]))
    with sqlite3.connect(archive.path) as con:  # make it look like a version-1 archive
        con.execute("DROP TABLE pending_area_results")
        con.execute("DROP TABLE pending_periods")
        con.execute("UPDATE schema_version SET version = 1")
    assert archive.periods() == ["2026-W46"] and archive.pending().empty
    archive.stage_period("2026-W47", _frame([True] * 4), run_id="r")
    archive.promote_period("r")
    with sqlite3.connect(archive.path) as con:
        assert con.execute("SELECT version FROM schema_version").fetchone() == (SCHEMA_VERSION,)
    assert archive.periods() == ["2026-W46", "2026-W47"]


def test_archive_permissions_are_kept(archive):
    import os
    import stat

    archive.write_period("2026-W46", _frame([True, False, False, False]))
    os.chmod(archive.path, 0o600)
    archive.stage_period("2026-W47", _frame([True] * 4), run_id="r")
    archive.promote_period("r")
    assert stat.S_IMODE(os.stat(archive.path).st_mode) == 0o600


# ----------------------------------------------------------------------- settings per period
def test_settings_are_recorded_and_a_change_stops(tmp_path):
    from areamap.archive import HistoryArchive

    a = HistoryArchive(tmp_path / "h.sqlite")
    flags = pd.DataFrame({"flag": [True, False]}, index=["A", "B"])
    settings = {"window_weeks": 1, "model": {"model": "bym2"}, "flags": {"min_probability": 0.8}}
    a.write_period("2026-W46", flags, settings=settings, series="")
    assert a.settings("2026-W46") == settings
    a.check_settings("2026-W47", settings)  # same settings: nothing raised
    a.check_settings("2026-W46", {**settings, "window_weeks": 4})  # no earlier period than 2026-W46
    changed = {**settings, "window_weeks": 4, "flags": {"min_probability": 0.9}}
    with pytest.raises(ArchiveError, match=r"flags.min_probability: 0.8 in the archive, 0.9 in this run; "
                                           r"window_weeks: 1 in the archive, 4 in this run") as info:
        a.check_settings("2026-W47", changed)
    assert '[output] series = "w4-bym2"' in str(info.value)


def test_archives_without_recorded_settings_are_checked_on_the_window(tmp_path):
    from areamap.archive import HistoryArchive

    a = HistoryArchive(tmp_path / "h.sqlite")
    a.write_period("2026-W46", pd.DataFrame({"flag": [True]}, index=["A"]), window_weeks=2)
    assert a.settings("2026-W46") == {"window_weeks": 2}
    a.check_settings("2026-W47", {"window_weeks": 2, "model": {"model": "leroux"}})
    with pytest.raises(ArchiveError, match="window_weeks: 2 in the archive, 1 in this run"):
        a.check_settings("2026-W47", {"window_weeks": 1})
