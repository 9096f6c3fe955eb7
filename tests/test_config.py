"""Tests of areamap.config: TOML run configuration, defaults, checks and path resolution."""

from __future__ import annotations

import re
from dataclasses import fields
from pathlib import Path

import pytest

from areamap.config import RunConfig, config_from_dict, config_reference_table, load_config
from areamap.errors import ConfigError

MINIMAL = """\
[boundaries]
file = "areas.gpkg"
[cases]
file = "cases.csv"
[population]
file = "population.csv"
"""


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    for name in ("areas.gpkg", "cases.csv", "population.csv"):
        (tmp_path / name).write_text("placeholder\n")
    return tmp_path


def write(folder: Path, extra: str = "", *, base: str = MINIMAL, name: str = "run.toml") -> Path:
    p = folder / name
    p.write_text(base + extra, encoding="utf-8")
    return p


def test_minimal_config_fills_agreed_defaults(folder):
    # Defaults: permutations 9999 (enough resolution for FDR over a few thousand areas), alpha 0.05, ...
    cfg = load_config(write(folder))
    assert cfg.clusters.permutations == 9999
    assert cfg.clusters.alpha == 0.05
    assert cfg.clusters.adjust == "fdr"
    assert cfg.clusters.statistic == "local_moran"
    assert cfg.graph.method == "queen" and cfg.graph.snap == 0.0 and cfg.graph.k == 5
    assert cfg.graph.islands == "keep" and cfg.graph.island_k == 1
    assert cfg.period.week == "latest" and cfg.period.window_weeks == 1
    assert cfg.smoothing.model == "bym2" and cfg.smoothing.covariates == ()
    assert cfg.smoothing.priors.phi_tail == pytest.approx(2 / 3)  # exact fraction; approx only for float repr
    assert cfg.flags.min_probability == 0.8 and cfg.flags.use_clusters is True
    assert cfg.output.suppress_below == 5
    assert cfg.cases.format == "counts" and cfg.cases.encoding == "utf-8"
    assert cfg.standardization.reference == "internal" and cfg.standardization.rates_per == 100000.0


def test_relative_paths_resolve_against_config_folder(tmp_path):
    data = tmp_path / "data"
    conf = tmp_path / "conf"
    data.mkdir()
    conf.mkdir()
    for name in ("areas.gpkg", "cases.csv", "population.csv"):
        (data / name).write_text("x")
    text = MINIMAL.replace('"areas.gpkg"', '"../data/areas.gpkg"').replace('"cases.csv"', '"../data/cases.csv"')
    text = text.replace('"population.csv"', f'"{(data / "population.csv").as_posix()}"')  # absolute path kept
    p = conf / "run.toml"
    p.write_text(text)
    cfg = load_config(p)
    assert cfg.boundaries.file == (data / "areas.gpkg").resolve()
    assert cfg.cases.file == (data / "cases.csv").resolve()
    assert cfg.population.file == (data / "population.csv").resolve()
    assert cfg.output.archive == (conf / "history.sqlite").resolve()  # default archive sits beside the config
    assert cfg.path == p.resolve()


def test_unknown_key_suggests_nearest(folder):
    p = write(folder, "[clusters]\npermutatons = 99\n")
    with pytest.raises(ConfigError, match=re.escape(
        "Unknown key 'permutatons' in [clusters] of run.toml. Did you mean 'permutations'?"
    )):
        load_config(p)


def test_unknown_section_suggests_nearest(folder):
    p = write(folder, "[cluster]\nalpha = 0.1\n")
    with pytest.raises(ConfigError, match=r"Unknown key 'cluster' at the top level of run.toml. Did you mean 'clusters'\?"):
        load_config(p)


def test_unknown_nested_key(folder):
    p = write(folder, "[smoothing.priors]\nsigma_uper = 2.0\n")
    with pytest.raises(ConfigError, match=r"Unknown key 'sigma_uper' in \[smoothing.priors\].*'sigma_upper'"):
        load_config(p)


def test_unknown_key_without_close_match_lists_valid_keys(folder):
    p = write(folder, "[period]\nzzz = 1\n")
    with pytest.raises(ConfigError, match=r"Valid keys: week, window_weeks"):
        load_config(p)


@pytest.mark.parametrize(
    ("extra", "pattern"),
    [
        ('[clusters]\npermutations = "999"\n',
         r"Key 'permutations' in \[clusters\] of run.toml must be an integer in \[19, 999999\]\. Got '999' \(a string\) instead."),
        ("[clusters]\npermutations = true\n", r"must be an integer in \[19, 999999\]\. Got True \(a boolean\)"),
        ("[clusters]\npermutations = 9\n", r"must be an integer in \[19, 999999\]\. Got 9"),
        ("[clusters]\nalpha = 1.5\n", r"Key 'alpha' in \[clusters\] .* must be a number in \(0, 1\). Got 1.5"),
        ('[graph]\nmethod = "quen"\n', r"must be one of 'queen', 'rook', 'knn', 'distance'.*Did you mean 'queen'\?"),
        ("[graph]\nsnap = -1\n", r"Key 'snap' .* must be a number >= 0"),
        ('[flags]\nuse_clusters = "yes"\n', r"Key 'use_clusters' .* must be true or false"),
        ('[smoothing]\ncovariates = "income"\n', r"Key 'covariates' .* must be a list of strings"),
        ('[period]\nweek = "2025-W53"\n', r"Key 'week' in \[period\] .* ISO week"),  # 2025 has 52 ISO weeks (from memory: it starts on a Wednesday)
        ('[cases]\nfile = "cases.csv"\nencoding = "klingon"\n', r"unknown text encoding 'klingon'"),
        ("seed = -3\n", r"Key 'seed' at the top level of run.toml must be an integer >= 0"),
        ('graph = "queen"\n', r"'graph' in run.toml must be a table"),
    ],
)
def test_wrong_type_or_range(folder, extra, pattern):
    base = MINIMAL
    if extra.startswith("[cases]"):
        base = MINIMAL.replace('[cases]\nfile = "cases.csv"\n', "")
    if not extra.startswith("["):
        base, extra = extra, base  # top-level keys must come before the first table
    p = write(folder, extra, base=base)
    with pytest.raises(ConfigError, match=pattern):
        load_config(p)


def test_period_week_is_canonicalised(folder):
    cfg = load_config(write(folder, '[period]\nweek = "2026w5"\nwindow_weeks = 4\n'))
    assert cfg.period.week == "2026-W05" and cfg.period.window_weeks == 4


def test_integer_accepted_for_number(folder):
    cfg = load_config(write(folder, "[graph]\nmethod = \"distance\"\ndistance = 15000\n"))
    assert isinstance(cfg.graph.distance, float) and cfg.graph.distance == 15000.0


def test_missing_required_key(folder):
    p = write(folder, base=MINIMAL.replace('[cases]\nfile = "cases.csv"\n', "[cases]\nformat = \"counts\"\n"))
    with pytest.raises(ConfigError, match=r"Key 'file' is missing in \[cases\] of run.toml"):
        load_config(p)


def test_missing_input_file(folder):
    (folder / "cases.csv").unlink()
    with pytest.raises(ConfigError, match=r"File not found for key 'file' in \[cases\] of run.toml: .*cases.csv"):
        load_config(write(folder))


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match="Configuration file not found"):
        load_config(tmp_path / "nope.toml")


def test_invalid_toml(folder):
    with pytest.raises(ConfigError, match=r"run.toml is not valid TOML: .*line 2"):
        load_config(write(folder, base='title = "x"\n[boundaries\n'))


def test_config_not_utf8(folder):
    p = folder / "run.toml"
    p.write_bytes(MINIMAL.encode() + 'title = "Ostergötland"\n'.encode("latin-1"))
    with pytest.raises(ConfigError, match=r"not valid UTF-8 \(byte \d+, line 7\)"):
        load_config(p)


@pytest.mark.parametrize(
    ("extra", "pattern"),
    [
        ('[standardization]\nreference = "external"\n', r"reference = 'external' .* needs rates_file"),
        ('[graph]\nmethod = "distance"\n', r"method = 'distance' .* needs the key 'distance'"),
    ],
)
def test_cross_checks(folder, extra, pattern):
    with pytest.raises(ConfigError, match=pattern):
        load_config(write(folder, extra))


def test_config_from_dict_without_files():
    cfg = config_from_dict(
        {"boundaries": {"file": "b.gpkg"}, "cases": {"file": "c.csv"}, "population": {"file": "p.csv"}},
        base_dir="/somewhere", check_files=False,
    )
    assert cfg.boundaries.file == Path("/somewhere/b.gpkg").resolve()
    assert cfg.path is None


def _all_keys(cls, prefix=""):
    for f in fields(cls):
        if f.name == "path":
            continue
        if f.metadata.get("kind") == "section":
            yield from _all_keys(f.default_factory().__class__, f"{prefix}{f.name}.")
        else:
            yield f"{prefix}{f.name}"


def test_reference_table_lists_every_key():
    table = config_reference_table()
    keys = list(_all_keys(RunConfig))
    assert len(keys) > 40
    for k in keys:
        assert f"`{k}`" in table


def test_user_guide_documents_every_key():
    guide = Path(__file__).resolve().parents[1] / "docs" / "user-guide.md"
    text = guide.read_text(encoding="utf-8")
    missing = [k for k in _all_keys(RunConfig) if f"`{k}`" not in text]
    assert not missing, f"keys not documented in {guide.name}: {missing}"
    assert config_reference_table() in text, "regenerate the key table of docs/user-guide.md from config_reference_table()"
