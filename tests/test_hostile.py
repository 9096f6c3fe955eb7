"""The hostile set: inputs and situations a careless or hostile user produces, run through the command line.

Each case runs ``areamap check`` and/or ``areamap bulletin`` (through :func:`areamap.cli.main`) on a copy of a
small invented grid region and asserts three things (acceptance of issue 11):

* no internal error: the exit code is 0, 2 (input) or 3 (operating system), never 1, and no traceback;
* the message names the real cause, and ``check`` and ``bulletin`` agree on it (both call
  ``areamap.validation.prepare_run``);
* zero data loss: after a refused or failed run the previous bulletin folder and the history archive are
  byte-identical to what they were, and nothing foreign is deleted.

Classes covered: data loss (archive locked, archive commit failing, archive deleted during the run, crash
leftovers, hand-written and symlinked output folders, permissions, public folders), injection (formulas in
names, terminal escape sequences, huge names), inputs that silently mislead (overflowing counts, far-future
and far-away weeks, all-zero periods, implausible counts and populations, too few districts, no neighbours,
zero population, periods after the data, semicolon-separated files, symlink loops, wrong CRS labels, limits
on window length and permutations) and operational failures (disk full, moves across file systems).
The disclosure class (refit attack, subtraction of totals) is in tests/test_disclosure.py.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import sqlite3
import stat
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pytest
import shapely

from areamap import cli
from areamap.archive import HistoryArchive
from areamap.bulletin import _folder
from areamap.bulletin._folder import MARKER_NAME

N_SIDE = 4  # a 4 x 4 grid of invented districts
WEEKS = ["2026-W40", "2026-W41", "2026-W42", "2026-W43", "2026-W44"]


def _ids() -> list[str]:
    return [f"G{i:02d}" for i in range(N_SIDE * N_SIDE)]


def make_region(folder: Path, *, names=None, cases: str | None = None, population: str | None = None,
                extra_config: str = "", geoms=None, crs: str = "EPSG:3035") -> Path:
    """Write the small grid region (invented names and counts) and its run.toml; return the config path."""
    folder.mkdir(parents=True, exist_ok=True)
    ids = _ids()
    geoms = geoms or [shapely.box(x * 1000, y * 1000, x * 1000 + 1000, y * 1000 + 1000)
                      for y in range(N_SIDE) for x in range(N_SIDE)]
    names = names or [f"Grid district {i}" for i in range(len(geoms))]
    gpd.GeoDataFrame({"area_id": ids[:len(geoms)], "area_name": names}, geometry=geoms, crs=crs).to_file(
        folder / "areas.gpkg")
    if cases is None:
        rows = [f"{a},{w},{(7 * k + 3 * j) % 11 + (6 if k in (5, 6, 9) else 0)}"
                for k, a in enumerate(ids[:len(geoms)]) for j, w in enumerate(WEEKS)]
        cases = "area_id,week,cases\n" + "\n".join(rows) + "\n"
    if population is None:
        population = "area_id,population\n" + "".join(f"{a},{2000 + 150 * k}\n" for k, a in enumerate(ids[:len(geoms)]))
    (folder / "cases.csv").write_text(cases)
    (folder / "population.csv").write_text(population)
    (folder / "run.toml").write_text(
        'title = "Grid test"\n[boundaries]\nfile = "areas.gpkg"\nname_column = "area_name"\n'
        '[cases]\nfile = "cases.csv"\n[population]\nfile = "population.csv"\n'
        "[clusters]\npermutations = 99\n[output]\nper_period = false\n" + extra_config)
    return folder / "run.toml"


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def folder_state(folder: Path) -> dict:
    """File name -> hash of a folder (empty dict when missing)."""
    if not folder.exists():
        return {}
    return {p.name: _sha(p) for p in sorted(folder.iterdir()) if p.is_file()}


def archive_state(path: Path) -> list:
    if not path.exists():
        return []
    con = sqlite3.connect(path)
    try:
        return (con.execute("SELECT * FROM periods ORDER BY period").fetchall()
                + con.execute("SELECT * FROM area_results ORDER BY period, area_id").fetchall())
    finally:
        con.close()


def run(args, capsys) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture
def region(tmp_path) -> Path:
    return make_region(tmp_path / "region")


@pytest.fixture(scope="module")
def _published_template(tmp_path_factory) -> Path:
    config = make_region(tmp_path_factory.mktemp("template") / "region")
    assert cli.main(["bulletin", str(config), "--period", "2026-W43", "--quiet"]) == 0
    return config.parent


@pytest.fixture
def published(_published_template, tmp_path) -> Path:
    """A region with one bulletin (2026-W43) already published and archived (a fresh copy per test)."""
    import shutil

    shutil.copytree(_published_template, tmp_path / "region", symlinks=True)
    return tmp_path / "region" / "run.toml"


# ============================================================================ inputs that silently mislead
def _weeks_rows(value_for) -> str:
    ids = _ids()
    rows = [f"{a},{w},{value_for(k, j)}" for k, a in enumerate(ids) for j, w in enumerate(WEEKS)]
    return "area_id,week,cases\n" + "\n".join(rows) + "\n"


BASE_CASES = _weeks_rows(lambda k, j: (7 * k + 3 * j) % 11 + 1)

INPUT_CASES = {
    # name: (region keyword arguments, extra CLI args, expected message fragment)
    "count overflowing 64 bits": (dict(cases=BASE_CASES + "G01,2026-W44,1e20\n"), [], "too large to be exact"),
    "typo week far in the future": (dict(cases=BASE_CASES + "G01,2099-W10,3\n"), [], "after the current week"),
    "week far before the rest": (dict(cases=BASE_CASES + "G01,2019-W10,3\n"), [], "gap of"),
    "all-zero period": (dict(cases=BASE_CASES + "".join(f"{a},2026-W45,0\n" for a in _ids())), [],
                        "has no cases in any district"),
    "zero-population district": (dict(
        cases=_weeks_rows(lambda k, j: 0 if k == 3 else (7 * k + 3 * j) % 11 + 1),
        population="area_id,population\n" + "".join(f"{a},{0 if k == 3 else 2000}\n" for k, a in enumerate(_ids()))),
        [], "have zero population (G03)"),
    "period after the data": (dict(), ["--period", "2026-W46"], "after the last week with case rows"),
    "too few districts": (dict(geoms=[shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1), shapely.box(2, 0, 3, 1)],
                               names=["A", "B", "C"],
                               cases="area_id,week,cases\nG00,2026-W44,3\nG01,2026-W44,2\nG02,2026-W44,5\n",
                               population="area_id,population\nG00,100\nG01,200\nG02,300\n"), [],
                          "needs at least 4"),
    "all districts islands": (dict(geoms=[shapely.box(3 * x, 3 * y, 3 * x + 1, 3 * y + 1)
                                          for y in range(N_SIDE) for x in range(N_SIDE)]), [],
                              "No district has a neighbour"),
    "implausible counts as errors": (dict(cases=BASE_CASES + "G02,2026-W44,90000\n",
                                          extra_config='[checks]\nimplausible = "error"\n'), [],
                                     "exceed the population at risk"),
    "population above world population": (dict(population="area_id,population\n" + "".join(
        f"{a},{1e308 if k == 0 else 2000}\n" for k, a in enumerate(_ids())),
        extra_config='[checks]\nimplausible = "error"\n'), [], "more people than live on Earth"),
    "window of 200000 weeks": (dict(extra_config="[period]\nwindow_weeks = 200000\n"), [],
                               "must be an integer in [1, 520]"),
    "metres labelled as degrees with knn": (dict(crs="EPSG:4326", extra_config='[graph]\nmethod = "knn"\nk = 3\n'),
                                            [], "probably projected coordinates"),
}


@pytest.mark.parametrize("case", sorted(INPUT_CASES))
def test_check_and_bulletin_agree_on_the_real_cause(tmp_path, capsys, case):
    kwargs, extra_args, fragment = INPUT_CASES[case]
    config = make_region(tmp_path / "r", **kwargs)
    code_check, _, err_check = run(["check", config, *extra_args], capsys)
    out = tmp_path / "r" / "bulletin"
    code_bulletin, _, err_bulletin = run(["bulletin", config, "--out", out, "--quiet", *extra_args], capsys)
    assert code_check == 2 and code_bulletin == 2, (err_check, err_bulletin)
    assert fragment in err_check and fragment in err_bulletin
    # the same cause, word for word (the bulletin may only add nothing of its own)
    assert err_check == err_bulletin
    assert "Traceback" not in err_check + err_bulletin and "internal error" not in err_check + err_bulletin
    assert not out.exists() and not (tmp_path / "r" / "history.sqlite").exists()


def test_permutation_limit(tmp_path, capsys):
    config = make_region(tmp_path / "r")
    config.write_text(config.read_text().replace("permutations = 99", "permutations = 10000000"))
    code, _, err = run(["check", config], capsys)
    assert code == 2 and "must be an integer in [19, 999999]" in err


def test_implausible_values_warn_by_default(tmp_path, capsys):
    config = make_region(tmp_path / "r", cases=BASE_CASES + "G02,2026-W44,90000\n")
    code, out, err = run(["check", config], capsys)
    assert code == 0 and "warning:" in err and "exceed the population at risk (G02 2026-W44)" in err


def test_semicolon_separated_file_is_read(tmp_path, capsys):
    config = make_region(tmp_path / "r", cases=BASE_CASES.replace(",", ";"))
    code, out, err = run(["check", config], capsys)
    assert code == 0, err
    assert "separates its columns with semicolons" in err and "Inputs are usable." in out


def test_decimal_comma_is_named(tmp_path, capsys):
    pop = "area_id;population\n" + "".join(f"{a};{2000 + k},5\n" for k, a in enumerate(_ids()))
    config = make_region(tmp_path / "r", population=pop)
    code, _, err = run(["check", config], capsys)
    assert code == 2 and "decimal commas (830,5) must be written with a point" in err


def test_symlink_loop_in_input_path(tmp_path, capsys):
    config = make_region(tmp_path / "r")
    loop = tmp_path / "r" / "loop.csv"
    os.symlink(tmp_path / "r" / "loop2.csv", loop)
    os.symlink(loop, tmp_path / "r" / "loop2.csv")
    config.write_text(config.read_text().replace('file = "cases.csv"', 'file = "loop.csv"'))
    code, _, err = run(["check", config], capsys)
    assert code == 2 and "points back to itself" in err and "internal error" not in err


def test_future_weeks_allowed_explicitly(tmp_path, capsys):
    config = make_region(tmp_path / "r", cases=BASE_CASES + "G01,2026-W45,3\n",
                         extra_config="[checks]\nallow_future_weeks = true\n")
    # today is fixed in Python; through the CLI the real date is used, so only the Python API is checked here
    from datetime import date

    from areamap.intake import check_study

    report = check_study(config, today=date(2026, 11, 2))  # Monday of 2026-W45
    assert report.plan.period == "2026-W45"
    config.write_text(config.read_text().replace("allow_future_weeks = true", "allow_future_weeks = false"))
    with pytest.raises(Exception, match="after the current week 2026-W44"):
        check_study(config, today=date(2026, 11, 1))  # Sunday of 2026-W44


# ============================================================================ injection
def test_escape_sequences_are_shown_not_sent(tmp_path, capsys):
    names = [f"Grid district {i}" for i in range(16)]
    names[0] = "Evil\x1b[2J\x1b[31mred\u202eelif"
    config = make_region(tmp_path / "r", names=names,
                         population="area_id,population\n" + "".join(
                             f"{a},{500 if k == 0 else 2000}\n" for k, a in enumerate(_ids())))
    code, out, err = run(["check", config], capsys)
    assert code == 0, err
    assert "\x1b" not in out + err and "\u202e" not in out + err
    assert "Evil\\x1b[2J\\x1b[31mred\\u202eelif" in out  # small-population note names the district


def test_formula_names_neutralised_and_huge_names_capped(tmp_path, capsys):
    names = [f"Grid district {i}" for i in range(16)]
    names[0], names[1], names[2] = "=HYPERLINK(\"http://x\",\"y\")", "@SUM(A1)", "N" * 200_000
    config = make_region(tmp_path / "r", names=names)
    out = tmp_path / "r" / "bulletin"
    code, _, err = run(["bulletin", config, "--out", out, "--quiet", "--public"], capsys)
    assert code == 0, err
    table = pd.read_csv(out / "areas.csv", dtype=str, keep_default_na=False)
    assert table.loc[0, "area_name"] == "'=HYPERLINK(\"http://x\",\"y\")"
    assert table.loc[1, "area_name"] == "'@SUM(A1)"
    assert table.loc[2, "area_name"] == "N" * 200_000  # tables keep the full name
    html_text = (out / "index.html").read_text()
    widths = [int(w) for w in pd.Series(html_text.split('width="')[1:]).str.extract(r"^(\d+)")[0].dropna()]
    assert widths and max(widths) < 3000  # no figure stretched by the long name


# ============================================================================ data loss
def test_archive_locked_by_a_reader_changes_nothing(published, capsys, monkeypatch):
    folder = published.parent / "bulletin"
    archive = published.parent / "history.sqlite"
    before = (folder_state(folder), archive_state(archive))
    import areamap.bulletin.publish as publish

    monkeypatch.setattr(publish, "HistoryArchive", lambda path: HistoryArchive(path, timeout=0.3))
    reader = sqlite3.connect(archive, isolation_level=None)
    reader.execute("BEGIN")
    reader.execute("SELECT COUNT(*) FROM area_results").fetchall()  # holds a shared lock: no commit possible
    try:
        code, _, err = run(["bulletin", published, "--period", "2026-W44", "--quiet"], capsys)
    finally:
        reader.execute("ROLLBACK")
        reader.close()
    assert code == 2 and "locked by another run" in err
    assert (folder_state(folder), archive_state(archive)) == before
    assert not list(published.parent.glob(".bulletin.*"))
    assert HistoryArchive(archive).pending().empty


def test_failed_archive_commit_puts_the_old_folder_back(published, capsys, monkeypatch):
    folder = published.parent / "bulletin"
    archive = published.parent / "history.sqlite"
    before = (folder_state(folder), archive_state(archive))
    from areamap.errors import ArchiveError

    def refuse(self, run_id):
        raise ArchiveError("The history archive is locked by another run (simulated).")

    monkeypatch.setattr(HistoryArchive, "promote_period", refuse)
    code, _, err = run(["bulletin", published, "--period", "2026-W44", "--quiet"], capsys)
    assert code == 2 and "simulated" in err
    assert (folder_state(folder), archive_state(archive)) == before  # folder swapped back
    assert not list(published.parent.glob(".bulletin.*"))


def test_archive_deleted_during_the_run_is_detected(published, capsys, monkeypatch):
    folder = published.parent / "bulletin"
    before = folder_state(folder)
    original = HistoryArchive.promote_period

    def promote_then_delete(self, run_id):
        key = original(self, run_id)
        self.path.unlink()  # someone deletes the archive right after the commit
        return key

    monkeypatch.setattr(HistoryArchive, "promote_period", promote_then_delete)
    code, _, err = run(["bulletin", published, "--period", "2026-W44", "--quiet"], capsys)
    assert code == 2 and "disappeared" in err and "success" not in err
    assert folder_state(folder) == before  # not published: the archive does not hold the period


def test_crash_between_the_renames_is_repaired(published, capsys):
    parent = published.parent
    folder = parent / "bulletin"
    # what a crash between the two renames of the fallback swap leaves: no folder, a marked previous one
    os.rename(folder, parent / ".bulletin.previous-deadbeef")
    (parent / ".bulletin.tmp-cafe").mkdir()
    (parent / ".bulletin.tmp-cafe" / "index.html").write_text("half written")
    code, out, err = run(["bulletin", published, "--period", "2026-W44"], capsys)
    assert code == 0, err
    assert "Restored the bulletin folder" in out and "Removed 1 leftover folder" in out
    assert sorted(p.name for p in parent.iterdir() if p.name.startswith(".bulletin")) == []
    assert json.loads((folder / "run.json").read_text())["period"]["key"] == "2026-W44"


def test_crash_after_the_swap_completes_the_archive(published, capsys):
    parent = published.parent
    archive = HistoryArchive(parent / "history.sqlite")
    marker = json.loads((parent / "bulletin" / MARKER_NAME).read_text())
    table = archive.read_period("2026-W43")
    # the folder was published by run X, whose archive entry was staged but never promoted
    with sqlite3.connect(archive.path) as con:
        con.execute("DELETE FROM area_results WHERE period = '2026-W43'")
        con.execute("DELETE FROM periods WHERE period = '2026-W43'")
    archive.stage_period("2026-W43", table, run_id=marker["run_id"], out_dir=parent / "bulletin")
    assert archive.periods() == []
    code, out, err = run(["bulletin", published, "--period", "2026-W44"], capsys)
    assert code == 0, err
    assert "Completed the archive entry of 2026-W43" in out
    assert archive.periods() == ["2026-W43", "2026-W44"] and archive.pending().empty


def test_hand_written_folder_is_never_replaced(region, capsys):
    out = region.parent / "site"
    out.mkdir()
    (out / "index.html").write_text("<p>my own page</p>")
    (out / "areas.csv").write_text("mine\n")
    before = folder_state(out)
    code, _, err = run(["bulletin", region, "--out", out, "--quiet"], capsys)
    assert code == 2 and "was not written by areamap" in err
    assert folder_state(out) == before


def test_symlinked_out_publishes_into_the_target(published, capsys):
    parent = published.parent
    target = parent / "bulletin"
    link = parent / "current"
    os.symlink(target, link)
    code, out, err = run(["bulletin", published, "--out", link, "--period", "2026-W44"], capsys)
    assert code == 0, err
    assert link.is_symlink() and link.resolve() == target.resolve()
    assert json.loads((target / "run.json").read_text())["period"]["key"] == "2026-W44"
    assert "symbolic link" in out


def test_folder_and_archive_permissions_are_kept(published, capsys):
    parent = published.parent
    os.chmod(parent / "bulletin", 0o700)
    os.chmod(parent / "history.sqlite", 0o600)
    code, _, err = run(["bulletin", published, "--period", "2026-W44", "--quiet"], capsys)
    assert code == 0, err
    assert stat.S_IMODE(os.stat(parent / "bulletin").st_mode) == 0o700
    assert stat.S_IMODE(os.stat(parent / "history.sqlite").st_mode) == 0o600


def test_public_folder_is_not_replaced_by_unsuppressed_tables(region, capsys):
    out = region.parent / "public"
    assert run(["bulletin", region, "--out", out, "--public", "--quiet"], capsys)[0] == 0
    before = folder_state(out)
    code, _, err = run(["bulletin", region, "--out", out, "--quiet"], capsys)
    assert code == 2 and "holds a public bulletin" in err and folder_state(out) == before
    code, _, err = run(["bulletin", region, "--out", out, "--quiet", "--replace-public"], capsys)
    assert code == 0, err
    assert json.loads((out / MARKER_NAME).read_text())["public"] is False


# ============================================================================ operational failures
@pytest.mark.parametrize(("err_no", "text"), [(errno.ENOSPC, "the disk is full"),
                                              (errno.EXDEV, "the move crosses file systems")])
def test_disk_full_and_cross_device_are_operational(published, capsys, monkeypatch, err_no, text):
    folder = published.parent / "bulletin"
    archive = published.parent / "history.sqlite"
    before = (folder_state(folder), archive_state(archive))

    def fail(*args, **kwargs):
        raise OSError(err_no, os.strerror(err_no), str(folder))

    monkeypatch.setattr(_folder, "swap_in", fail)
    code, _, err = run(["bulletin", published, "--period", "2026-W44", "--quiet"], capsys)
    assert code == 3 and text in err and "bug" not in err
    assert (folder_state(folder), archive_state(archive)) == before
    assert not list(published.parent.glob(".bulletin.*"))


def test_per_period_folders_follow_the_same_rules(tmp_path, capsys):
    config = make_region(tmp_path / "r")
    config.write_text(config.read_text().replace("per_period = false", "per_period = true"))
    root = tmp_path / "r" / "bulletin"
    (root / "2026-W44").mkdir(parents=True)
    (root / "2026-W44" / "index.html").write_text("<p>hand-written</p>")
    code, _, err = run(["bulletin", config, "--quiet"], capsys)
    assert code == 2 and "was not written by areamap" in err
    assert (root / "2026-W44" / "index.html").read_text() == "<p>hand-written</p>"
    (root / "2026-W44" / "index.html").unlink()
    code, _, err = run(["bulletin", config, "--quiet"], capsys)
    assert code == 0, err
    assert (root / "2026-W44" / MARKER_NAME).is_file() and (root / "latest.html").is_file()
    assert not [p for p in root.iterdir() if p.name.startswith(".")]
