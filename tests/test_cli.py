"""Tests of the command line (areamap.cli): exit codes, messages, no tracebacks."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pytest
import shapely

import areamap
from areamap import cli
from areamap.demo import write_demo
from areamap.errors import GeometryRepairedWarning

CASES = "area_id,week,cases\nA,2026-W46,3\nB,2026-W47,1\nC,2026-W47,2\n"
POPULATION = "area_id,population\nA,1000\nB,800\nC,1200\nD,900\n"
CONFIG = """\
[boundaries]
file = "areas.gpkg"
[cases]
file = "cases.csv"
[population]
file = "population.csv"
"""


def tiny(folder: Path, *, cases: str | bytes = CASES, population: str = POPULATION, config: str = CONFIG,
         geoms=None) -> Path:
    # four districts: the fewest a bulletin (and so 'areamap check') accepts
    geoms = geoms or [shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1), shapely.box(2, 0, 3, 1), shapely.box(3, 0, 4, 1)]
    gpd.GeoDataFrame({"area_id": ["A", "B", "C", "D"]}, geometry=geoms, crs="EPSG:3035").to_file(folder / "areas.gpkg")
    if isinstance(cases, bytes):
        (folder / "cases.csv").write_bytes(cases)
    else:
        (folder / "cases.csv").write_text(cases)
    (folder / "population.csv").write_text(population)
    (folder / "run.toml").write_text(config)
    return folder / "run.toml"


@pytest.fixture(scope="module")
def demo_config(tmp_path_factory) -> Path:
    return write_demo(tmp_path_factory.mktemp("cli-demo"))


def test_version(capsys):
    assert cli.main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"areamap {areamap.__version__}"


def _subcommands() -> list[str]:
    parser = cli._build_parser()
    action = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return sorted(action.choices)


@pytest.mark.parametrize("command", _subcommands())
def test_help_on_every_subcommand(command, capsys):
    assert cli.main([command, "--help"]) == 0
    assert f"usage: areamap {command}" in capsys.readouterr().out


def test_no_subcommand_is_usage_error(capsys):
    assert cli.main([]) == 2
    assert "usage: areamap" in capsys.readouterr().err


def test_unknown_option_is_usage_error(capsys):
    assert cli.main(["check", "run.toml", "--frobnicate"]) == 2
    assert "unrecognized arguments" in capsys.readouterr().err


def test_check_demo_exits_zero(demo_config, capsys):
    assert cli.main(["check", str(demo_config)]) == 0
    out = capsys.readouterr().out
    assert "Inputs are usable." in out
    assert "Weeks: 2026-W18 to 2026-W47 (30 weeks)" in out
    assert "islands: Skerrowholm Isle" in out


def test_check_tiny(tmp_path, capsys):
    assert cli.main(["check", str(tiny(tmp_path))]) == 0
    out = capsys.readouterr().out
    assert "Areas: 4" in out and "Total cases: 6" in out and "Age groups: all" in out


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"cases": CASES + "Z,2026-W47,1\n"}, "error: 1 area id(s) in cases.csv are not in the boundaries file"),
        ({"cases": CASES + "A,2026-W47,-1\n"}, "error: Column 'cases' in cases.csv has 1 negative counts"),
        ({"cases": CASES + "A,2026-W99,1\n"}, "neither ISO weeks nor dates"),
        ({"cases": ""}, "error: The cases file cases.csv is empty (0 bytes)"),
        ({"cases": "area_id,week,cases\n"}, "but no data rows"),
        ({"cases": "área_id,week,cases\nA,2026-W47,1\n".encode("latin-1")}, 'set encoding = "latin-1"'),
        ({"population": "area_id,population\nA,1000\nB,800\nD,900\n"}, "have no population in population.csv (C)"),
        ({"config": CONFIG + "[clusters]\npermutatons = 99\n"}, "Did you mean 'permutations'?"),
        ({"config": CONFIG + '[graph]\nmethod = "knn"\nk = "2"\n'}, "Key 'k' in [graph] of run.toml must be an integer"),
        ({"geoms": [shapely.box(0, 0, 1, 1), shapely.Polygon(), shapely.box(2, 0, 3, 1), shapely.box(3, 0, 4, 1)]},
         "have a missing or empty geometry (B)"),
    ],
)
def test_check_errors_exit_2_without_traceback(tmp_path, capsys, change, message):
    assert cli.main(["check", str(tiny(tmp_path, **change))]) == 2
    captured = capsys.readouterr()
    assert message in captured.err
    assert captured.err.startswith("error: ")
    assert "Traceback" not in captured.err
    assert captured.out == ""


def test_missing_config_exit_2(tmp_path, capsys):
    assert cli.main(["check", str(tmp_path / "none.toml")]) == 2
    assert "Configuration file not found" in capsys.readouterr().err


def test_warnings_are_one_line(tmp_path, capsys):
    spiky = shapely.Polygon([(2, 0), (3, 0), (3, 0.5), (3.5, 0.5), (3, 0.5), (3, 1), (2, 1)])
    cfg = tiny(tmp_path, geoms=[shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1), spiky, shapely.box(3, 0, 4, 1)])
    assert cli.main(["check", str(cfg)]) == 0
    err = capsys.readouterr().err
    assert err.startswith("warning: Repaired 1 invalid geometries in areas.gpkg (C)")
    assert "GeometryRepairedWarning" not in err  # not Python's default warning format


def test_internal_error_exit_1(tmp_path, capsys, monkeypatch):
    def boom(config, **kwargs):
        raise RuntimeError("something broke\nsecond line")

    monkeypatch.setattr("areamap.intake.check_study", boom)
    monkeypatch.delenv("AREAMAP_DEBUG", raising=False)
    assert cli.main(["check", str(tiny(tmp_path))]) == 1
    err = capsys.readouterr().err
    assert err.startswith("internal error: RuntimeError: something broke\n")
    assert "please report" in err and "Traceback" not in err and "second line" not in err


def test_debug_env_shows_traceback(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("AREAMAP_DEBUG", "1")
    assert cli.main(["check", str(tiny(tmp_path, cases=""))]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_warning_filter_restored(tmp_path):
    before = warnings.showwarning
    cli.main(["check", str(tiny(tmp_path))])
    assert warnings.showwarning is before
    with pytest.warns(GeometryRepairedWarning):  # warnings still reach pytest after main returns
        warnings.warn("x", GeometryRepairedWarning, stacklevel=1)


def _installed_script() -> str:
    exe = Path(sys.executable).parent / "areamap"
    found = str(exe) if exe.exists() else shutil.which("areamap")
    if found is None:  # pragma: no cover - the package is installed in the test environment
        pytest.skip("the areamap console script is not installed")
    return found


@pytest.mark.slow
def test_installed_script_exit_codes(demo_config, tmp_path):
    script = _installed_script()
    env = {k: v for k, v in os.environ.items() if k != "AREAMAP_DEBUG"}
    ok = subprocess.run([script, "check", str(demo_config)], capture_output=True, text=True, env=env, timeout=300)
    assert ok.returncode == 0, ok.stderr
    assert "Inputs are usable." in ok.stdout and "Traceback" not in ok.stderr
    bad = subprocess.run([script, "check", str(tiny(tmp_path, cases=CASES + "B,2026-W47,2.5\n"))],
                         capture_output=True, text=True, env=env, timeout=300)
    assert bad.returncode == 2
    assert "fractional counts" in bad.stderr and "Traceback" not in bad.stderr
    version = subprocess.run([script, "--version"], capture_output=True, text=True, env=env, timeout=300)
    assert version.returncode == 0 and areamap.__version__ in version.stdout


@pytest.mark.slow
def test_demo_then_check(tmp_path, capsys):
    # `areamap demo` writes the region (and, once the bulletin exists, runs it); `areamap check` accepts its config.
    assert cli.main(["demo", "--out", str(tmp_path / "d"), "--seed", "3"]) == 0
    assert (tmp_path / "d" / "run.toml").exists()
    capsys.readouterr()
    assert cli.main(["check", str(tmp_path / "d" / "run.toml")]) == 0
    assert "Inputs are usable." in capsys.readouterr().out


def test_history_trend_lines_show_weekly_counts_and_flag_letters():
    from areamap.cli import _trend_lines

    table = pd.DataFrame({
        "period": ["2026-W46", "2026-W47"], "area_id": ["A", "A"], "area_name": ["Alder", "Alder"],
        "observed": [3, 9], "week_observed": [3, 9], "flag": [False, True], "emerging": [False, True],
        "persistent": [False, False], "cluster": ["not significant", "not significant"],
    })
    weekly = pd.DataFrame({"2026-W44": [1], "2026-W45": [2], "2026-W46": [3], "2026-W47": [9]}, index=["A"])
    text = _trend_lines(table, weekly=weekly, last=4)
    assert "2026-W44 to 2026-W47" in text
    assert "counts 1 2 3 9" in text
    assert text.splitlines()[-1].split() == ["flags", ".", "E"]  # W44, W45 not archived: blank
    # without the cases file: the archived newest-week counts, '-' where no period is archived
    assert "counts - - 3 9" in _trend_lines(table, last=4)
