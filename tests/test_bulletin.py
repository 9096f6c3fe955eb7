"""Tests of the weekly bulletin (areamap.bulletin) and the bulletin/history/demo commands."""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from areamap.bulletin import AREA_COLUMNS, FlagRules, file_sha256, flag_areas, suppress_counts
from areamap.bulletin._folder import MARKER_NAME, check_replaceable, swap_in, write_marker
from areamap.errors import InputError, ParameterError


# ============================================================================ flag rules
def _flag_table(**cols) -> pd.DataFrame:
    base = {"observed": [10, 10, 10, 2], "p_exceed": [0.95, 0.5, 0.79999, 0.99],
            "cluster": ["not significant", "High-High", "High-High", "High-High"],
            "cluster_p": [0.5, 0.012, 0.0004, 0.02]}
    base.update(cols)
    return pd.DataFrame(base, index=pd.Index(["A", "B", "C", "D"], name="area_id"))


def test_default_rule_is_probability_or_high_high():
    out = flag_areas(_flag_table())
    assert out["flag"].tolist() == [True, True, True, True]
    assert out.loc["A", "flag_reason"] == "P(RR>1)=0.95 >= 0.8"
    assert out.loc["B", "flag_reason"] == "High-High cluster (FDR q=0.012)"
    # 0.79999 is below the 0.8 cut-off: only the cluster rule is met
    assert out.loc["C", "flag_reason"] == "High-High cluster (FDR q=<0.001)"
    assert out.loc["D", "flag_reason"] == "P(RR>1)=0.99 >= 0.8; High-High cluster (FDR q=0.020)"


@pytest.mark.parametrize("p, text", [(0.93, "=0.93"), (0.994, "=0.99"), (0.9961, "=0.996"),
                                     (0.99971, ">0.999"), (1.0, "=1")])
def test_probability_in_reason_never_rounds_up_to_one(p, text):
    out = flag_areas(_flag_table(p_exceed=[p] * 4, cluster=["not significant"] * 4))
    assert out.loc["A", "flag_reason"] == f"P(RR>1){text} >= 0.8"


def test_probability_cut_off_is_inclusive():
    out = flag_areas(_flag_table(p_exceed=[0.8, 0.1, 0.1, 0.1],
                                 cluster=["not significant"] * 4), rules=FlagRules())
    assert out["flag"].tolist() == [True, False, False, False]


def test_cluster_rule_can_be_switched_off():
    out = flag_areas(_flag_table(), rules=FlagRules(use_clusters=False))
    assert out["flag"].tolist() == [True, False, False, True]
    assert out.loc["B", "flag_reason"] == ""


def test_scan_rule_flags_districts_inside_significant_raised_zones():
    t = _flag_table(p_exceed=[0.1] * 4, cluster=["not significant"] * 4,
                    scan_zone=[1, 2, 0, 3], scan_p=[0.0004, 0.2, np.nan, 0.01], scan_high=[True, True, False, False])
    out = flag_areas(t, scan_alpha=0.05)
    # A: zone 1 significant; B: zone 2 not significant; C: in no zone; D: significant but a low-risk zone
    assert out["flag"].tolist() == [True, False, False, False]
    assert out.loc["A", "flag_reason"] == "inside significant scan zone 1 (p=<0.001)"
    off = flag_areas(t, rules=FlagRules(use_scan=False))
    assert not off["flag"].any()
    text = FlagRules().describe(scan_alpha=0.05)
    assert "inside a scan zone of raised risk with Monte Carlo p < 0.05" in text
    assert "scan zone" not in FlagRules().describe()  # no scan run: the rule is not described
    with pytest.raises(ParameterError, match=r"The 'use_scan' parameter of FlagRules must be True or False"):
        FlagRules(use_scan="yes")


@pytest.mark.slow
def test_scan_section_run_json_and_columns_agree(demo_run):
    run = json.loads((demo_run["out"] / "run.json").read_text(encoding="utf-8"))
    scan = run["scan"]
    assert scan["kind"] == "spatial" and scan["replicates"] == 999 and scan["max_share"] == 0.1
    assert scan["seed"] == run["seed"]
    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    for zone in scan["zones_found"]:
        members = zone["members"]
        assert (t.loc[members, "scan_zone"] == zone["rank"]).all()
        np.testing.assert_allclose(t.loc[members, "scan_p"], zone["p_value"], rtol=1e-12)  # copied, not recomputed
        assert zone["observed"] == t.loc[members, "observed"].sum()
    assert (t["scan_zone"] > 0).sum() == sum(len(z["members"]) for z in scan["zones_found"])
    html = (demo_run["out"] / "index.html").read_text(encoding="utf-8")
    assert '<section id="scan">' in html
    n_sig = sum(z["p_value"] < 0.05 for z in scan["zones_found"])
    assert scan["significant_zones"] == n_sig
    assert html.count('<tr class="scan-row">') == n_sig
    assert ('id="fig-scan"' in html) == bool(scan["zones_found"])
    assert "Kulldorff M (1997)" in html


@pytest.mark.parametrize("cluster", ["Low-Low", "High-Low", "Low-High", "not significant", "no neighbours"])
def test_only_high_high_clusters_flag(cluster):
    out = flag_areas(_flag_table(p_exceed=[0.1] * 4, cluster=[cluster] * 4))
    assert not out["flag"].any()


def test_min_observed_holds_back_and_says_why():
    out = flag_areas(_flag_table(), rules=FlagRules(min_observed=3))
    assert out["flag"].tolist() == [True, True, True, False]
    assert out.loc["D", "flag_reason"].startswith("not flagged: fewer than 3 observed cases (min_observed)")


@pytest.mark.parametrize("adjust, text", [("bonferroni", "Bonferroni-adjusted p=0.012"),
                                          ("none", "unadjusted p=0.012")])
def test_reason_names_the_adjustment(adjust, text):
    out = flag_areas(_flag_table(), adjust=adjust)
    assert out.loc["B", "flag_reason"] == f"High-High cluster ({text})"


def test_threshold_appears_in_reason_and_description():
    rules = FlagRules(threshold=1.5, min_probability=0.9, min_observed=2)
    out = flag_areas(_flag_table(p_exceed=[0.95, 0.1, 0.1, 0.1]), rules=rules)
    assert out.loc["A", "flag_reason"] == "P(RR>1.5)=0.95 >= 0.9"
    text = rules.describe(adjust="fdr", alpha=0.05)
    assert "P(RR > 1.5) >= 0.9" in text and "alpha = 0.05" in text and "at least 2 observed" in text


def test_flag_rule_errors():
    with pytest.raises(ParameterError, match="'min_probability' parameter of FlagRules must be in \\(0, 1\\]"):
        FlagRules(min_probability=0)
    with pytest.raises(ParameterError, match="'min_observed' parameter of FlagRules"):
        FlagRules(min_observed=-1)
    with pytest.raises(ParameterError, match="needs columns observed, p_exceed, cluster, cluster_p"):
        flag_areas(_flag_table().drop(columns="cluster_p"))


# ============================================================================ suppression
@pytest.mark.parametrize("threshold, expected", [
    (5, ["0", "<5", "<5", "5", "123"]),   # common practice: 1-4 hidden, 0 shown
    (3, ["0", "<3", "4", "5", "123"]),
    (1, ["0", "1", "4", "5", "123"]),     # threshold 1 hides nothing
    (0, ["0", "1", "4", "5", "123"]),
])
def test_suppress_counts(threshold, expected):
    out = suppress_counts(pd.Series([0, 1, 4, 5, 123], index=list("abcde")), threshold=threshold)
    assert out.tolist() == expected
    assert out.index.tolist() == list("abcde")


# ============================================================================ files
def test_file_sha256_matches_hashlib(tmp_path):
    data = bytes(range(256)) * 5000  # > 1 MiB, so several blocks are read
    p = tmp_path / "blob.bin"
    p.write_bytes(data)
    assert file_sha256(p) == hashlib.sha256(data).hexdigest()


def _check_out_dir(out, inputs, *, public=False, replace_public=False):
    check_replaceable(out, inputs, public=public, replace_public=replace_public)


def test_output_folder_checks(tmp_path):
    out = tmp_path / "bulletin"
    _check_out_dir(out, [])  # missing: fine
    out.mkdir()
    _check_out_dir(out, [])  # empty: fine
    (out / "index.html").write_text("old")
    with pytest.raises(InputError, match="was not written by areamap"):
        _check_out_dir(out, [])  # a hand-written page is never replaced
    write_marker(out, {"run_id": "x", "period": "2026-W47", "public": False})
    _check_out_dir(out, [])  # a previous bulletin: fine
    (out / "notes.txt").write_text("mine")
    with pytest.raises(InputError, match="holds files that are not bulletin outputs \\(notes.txt\\)"):
        _check_out_dir(out, [])
    (out / "notes.txt").unlink()
    with pytest.raises(InputError, match="contains the cases file"):
        _check_out_dir(tmp_path, [("cases", tmp_path / "cases.csv")])
    f = tmp_path / "afile"
    f.write_text("x")
    with pytest.raises(InputError, match="exists and is a file"):
        _check_out_dir(f, [])


def test_publish_replaces_the_previous_folder(tmp_path):
    out = tmp_path / "bulletin"
    out.mkdir()
    (out / "index.html").write_text("old")
    tmp = tmp_path / ".bulletin.tmp-1"
    tmp.mkdir()
    (tmp / "index.html").write_text("new")
    previous = tmp_path / ".bulletin.previous-1"
    assert swap_in(tmp, out, previous)
    assert (out / "index.html").read_text() == "new"
    assert (previous / "index.html").read_text() == "old"
    assert not tmp.exists()


# ============================================================================ end to end on the demo region
def _sha(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _folder_hashes(folder: Path) -> dict[str, str]:
    return {p.name: _sha(p) for p in sorted(Path(folder).iterdir()) if p.is_file()}


def cfg_permutations(config) -> int:
    from areamap.config import load_config

    return load_config(config).clusters.permutations


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """The invented demo region, bulletins for 2026-W46 then 2026-W47 (the demo's last two weeks)."""
    from areamap.bulletin import run_bulletin
    from areamap.demo import write_demo

    folder = tmp_path_factory.mktemp("demo")
    config = write_demo(folder)
    out = folder / "bulletin"
    messages: list[str] = []
    previous = run_bulletin(config, period="2026-W46", out=out)
    previous_csv = pd.read_csv(previous.out / "areas.csv", dtype={"area_id": str})
    result = run_bulletin(config, out=out, progress=messages.append)
    # one folder per period under the output root, by default
    assert previous.out == out / "2026-W46" and result.out == out / "2026-W47"
    return {"folder": folder, "config": config, "out": result.out, "root": out, "result": result,
            "previous": previous, "previous_csv": previous_csv, "messages": messages}


@pytest.mark.slow
def test_outputs_exist_with_named_columns(demo_run):
    import geopandas as gpd
    import pyogrio

    out, result = demo_run["out"], demo_run["result"]
    assert sorted(p.name for p in out.iterdir()) == sorted(["index.html", "areas.csv", "areas.gpkg", "run.json",
                                                          MARKER_NAME])
    table = pd.read_csv(out / "areas.csv", dtype={"area_id": str})
    assert list(table.columns) == list(AREA_COLUMNS)
    assert sorted(p.name for p in demo_run["root"].iterdir()) == ["2026-W46", "2026-W47", "latest.html"]
    assert 'url=2026-W47/index.html' in (demo_run["root"] / "latest.html").read_text()
    boundaries = gpd.read_file(demo_run["folder"] / "districts.gpkg")
    assert table["area_id"].tolist() == boundaries["district_id"].astype(str).tolist()  # boundaries order
    assert set(table["cluster"]) <= {"High-High", "Low-Low", "High-Low", "Low-High", "not significant",
                                     "no neighbours"}
    assert set(table["flag"]) <= {True, False}
    assert (table["period_start"] == "2026-11-16").all() and (table["period_end"] == "2026-11-22").all()
    assert list(pyogrio.list_layers(out / "areas.gpkg")[:, 0]) == ["areas"]
    gpkg = gpd.read_file(out / "areas.gpkg")
    assert [c for c in gpkg.columns if c != "geometry"] == list(AREA_COLUMNS)
    assert gpkg.crs == boundaries.crs
    assert len(gpkg) == len(table) == len(result.areas)
    # progress was reported step by step, ending with the archive step
    assert demo_run["messages"][0].startswith("[1/") and "archiv" in demo_run["messages"][-1]


@pytest.mark.slow
def test_numbers_are_consistent(demo_run):
    from scipy import stats

    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str})
    # internal reference: expected counts add up to the observed total (indirect standardization identity)
    np.testing.assert_allclose(t["expected"].sum(), t["observed"].sum(), rtol=1e-9)  # CSV keeps 10 digits
    np.testing.assert_allclose(t["sir"], t["observed"] / t["expected"], rtol=1e-8)  # same rounding
    # exact Poisson limits (Garwood 1936; chi-square form as in Breslow & Day 1987 vol. II, eq. 2.11 -- the
    # equation number is from memory)
    o = t["observed"].to_numpy()
    low = np.where(o > 0, stats.chi2.ppf(0.025, 2 * o) / 2, 0.0) / t["expected"]
    high = stats.chi2.ppf(0.975, 2 * (o + 1)) / 2 / t["expected"]
    np.testing.assert_allclose(t["sir_low"], low, rtol=1e-7)  # CSV rounding to 10 significant digits
    np.testing.assert_allclose(t["sir_high"], high, rtol=1e-7)
    assert ((t["rr_low"] <= t["rr"]) & (t["rr"] <= t["rr_high"])).all()
    assert t["p_above_1"].between(0, 1).all()


@pytest.mark.slow
def test_planted_cluster_is_flagged(demo_run):
    """Most planted districts are flagged and few districts with true risk <= 1 are.

    The demo plants relative risk 2.5 in 8 contiguous districts for the last 4 weeks (truth.csv).
    With one week of data several planted districts expect only about one case, so perfect
    recall is not achievable; we require at least 5 of 8 (>= 60%, well above the roughly 20% of all
    districts a P(RR>1) >= 0.8 rule would flag by chance under a flat risk) and at most 5% of the
    districts whose true risk this week is <= 1 (common practice: a false-alarm rate of a few per cent).
    """
    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    truth = pd.read_csv(demo_run["folder"] / "truth.csv", dtype={"district_id": str}).set_index("district_id")
    planted = truth.index[truth["in_planted_cluster"] == 1]
    assert len(planted) == 8
    recall = t.loc[planted, "flag"].mean()
    assert recall >= 5 / 8
    not_raised = truth.index[truth["recent_rr"] <= 1.0]
    false_rate = t.loc[not_raised, "flag"].mean()
    assert false_rate <= 0.05


@pytest.mark.slow
def test_morans_i_equals_direct_recomputation(demo_run):
    """run.json's Moran's I from areas.csv and an independently built queen graph.

    EB-standardized ratios: Assunção & Reis (1999), Statistics in Medicine 18:2147, section 3
    (from memory): r_i = O_i / E_i, b = sum O / sum E, s2 = sum E_i (r_i - b)^2 / sum E,
    a = s2 - b / mean(E), v_i = a + b / E_i (b / E_i where v_i <= 0), z_i = (r_i - b) / sqrt(v_i).
    Moran's I (Moran 1950) with row-standardised weights, islands with an empty row:
    I = n / S0 * sum_ij w_ij z~_i z~_j / sum_i z~_i^2, z~ = z - mean(z), S0 = sum_ij w_ij.
    """
    import geopandas as gpd
    from libpysal.weights import Queen

    run = json.loads((demo_run["out"] / "run.json").read_text(encoding="utf-8"))
    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str})
    o, e = t["observed"].to_numpy(float), t["expected"].to_numpy(float)
    r = o / e
    b = o.sum() / e.sum()
    s2 = np.sum(e * (r - b) ** 2) / e.sum()
    a = s2 - b / e.mean()
    v = a + b / e
    v = np.where(v > 0, v, b / e)
    z = (r - b) / np.sqrt(v)

    gdf = gpd.read_file(demo_run["out"] / "areas.gpkg").set_index("area_id").loc[t["area_id"]]
    w = Queen.from_dataframe(gdf, use_index=True, silence_warnings=True)
    n = len(z)
    zc = z - z.mean()
    pos = {k: i for i, k in enumerate(gdf.index)}
    num = 0.0
    s0 = 0.0
    for focal, nbrs in w.neighbors.items():
        if nbrs:
            i = pos[focal]
            lag = np.mean([zc[pos[j]] for j in nbrs])
            num += zc[i] * lag
            s0 += 1.0
    expected_i = n / s0 * num / np.sum(zc**2)
    # the table carries 10 significant digits: agreement to 1e-6 relative is far tighter than any real difference
    np.testing.assert_allclose(run["morans_i"]["statistic"], expected_i, rtol=1e-6)
    np.testing.assert_allclose(run["morans_i"]["expected"], -1 / (n - 1), rtol=1e-12)  # E[I] = -1/(n-1)
    r = run["morans_i"]["permutations"]
    assert r == cfg_permutations(demo_run["config"])
    assert 1 / (r + 1) <= run["morans_i"]["p_value"] <= 1  # a permutation p-value is at least 1/(R+1)


@pytest.mark.slow
def test_run_json_provenance(demo_run):
    run = json.loads((demo_run["out"] / "run.json").read_text(encoding="utf-8"))
    folder = demo_run["folder"]
    hashes = {item["name"]: item["sha256"] for item in run["inputs"]}
    for name in ("run.toml", "districts.gpkg", "cases.csv", "population.csv"):
        assert hashes[name] == _sha(folder / name)
    assert run["seed"] == 20261202 and run["period"]["key"] == "2026-W47" and run["period"]["window_weeks"] == 1
    assert run["configuration"]["smoothing"]["model"] == "bym2"
    for key in ("hyperparameters", "dic", "waic"):
        assert key in run["model"]
    t = pd.read_csv(demo_run["out"] / "areas.csv")
    assert run["flags"]["total"] == int(t["flag"].sum())
    assert run["flags"]["new"] == int((t["flag_change"] == "new").sum())
    assert run["flags"]["continuing"] == int((t["flag_change"] == "continuing").sum())
    assert run["flags"]["resolved"] == int((t["flag_change"] == "resolved").sum())
    assert {"intake", "smoothing", "clusters", "figures", "total"} <= set(run["timings_seconds"])
    assert run["version"] == __import__("areamap").__version__


@pytest.mark.slow
def test_flags_follow_the_rule_and_the_history(demo_run):
    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    prev = demo_run["previous_csv"].set_index("area_id")
    # the demo's [flags] are the defaults; the 0.8 cut-off is the decision band of Richardson et al. (2004)
    in_scan = (t["scan_zone"] > 0) & (t["scan_p"] < 0.05)  # the demo scans for high risk only
    if demo_run["result"].run_info["spacetime"]["fitted"]:
        # space-time model fitted: persistent (P(RR / region > 1) >= 0.8), emerging (forecast FDR q <= 0.05)
        rule = ((t["week_excess_p"] >= 0.8) | (t["cluster"] == "High-High")
                | (t["forecast_q"].fillna(1.0) <= 0.05) | in_scan)
        assert (t["emerging"] == (t["flag"] & (t["forecast_q"].fillna(1.0) <= 0.05))).all()
        assert (t["persistent"] == (t["flag"] & (t["week_excess_p"] >= 0.8))).all()
    else:
        rule = (t["p_above_1"] >= 0.8) | (t["cluster"] == "High-High") | in_scan
    assert (t["flag"] == rule).all()
    assert (t.loc[t["flag"], "flag_reason"].str.len() > 0).all()
    assert (t.loc[~t["flag"], "flag_reason"].fillna("") == "").all()
    was = prev["flag"].reindex(t.index)
    assert (t["flag_change"] == np.select(
        [t["flag"] & was, t["flag"] & ~was, ~t["flag"] & was], ["continuing", "new", "resolved"],
        "not flagged")).all()
    # weeks_flagged: previous count + 1 when flagged now, 0 otherwise (both periods archived)
    assert (t["weeks_flagged"] == np.where(t["flag"], prev["weeks_flagged"].reindex(t.index) + 1, 0)).all()
    assert (prev["weeks_flagged"] == prev["flag"].astype(int)).all()  # first archived period


@pytest.mark.slow
def test_html_suppresses_small_counts_and_escapes(demo_run):
    import re

    html = (demo_run["out"] / "index.html").read_text(encoding="utf-8")
    cells = re.findall(r'<tr class="flagged-row[^"]*"[^>]*>.*?<td class="num observed">([^<]*)</td>',
                       html, flags=re.S)
    assert len(cells) == demo_run["result"].run_info["flags"]["total"]
    assert not {"1", "2", "3", "4"} & set(cells)
    # the explorable map's table suppresses the same way: observed cells never show 1-4
    rows = re.findall(r'<tr data-id="[^"]*"><th scope="row">[^<]*</th><td(?: data-sort="[^"]*")?>([^<]*)</td>', html)
    assert len(rows) == len(demo_run["result"].areas)
    assert not {"1", "2", "3", "4"} & set(rows) and "&lt;5" in rows
    # the only script is the page's own inline one; nothing is loaded
    assert html.count("<script") == 1 and "<script src" not in html


@pytest.mark.slow
def test_public_tables_suppress_small_counts_and_rerun_is_repeatable(demo_run, tmp_path):
    import geopandas as gpd

    from areamap.archive import HistoryArchive
    from areamap.bulletin import run_bulletin

    out = tmp_path / "public"
    result = run_bulletin(demo_run["config"], out=out, public=True)  # re-runs 2026-W47 on the same archive
    full = result.to_frame()
    # repeatable: same seed and inputs give the same numbers as the first run of this period
    first = demo_run["result"].to_frame()
    pd.testing.assert_frame_equal(full, first)
    # re-running a period replaces it in the archive (one row per area, periods unchanged)
    archive = HistoryArchive(demo_run["folder"] / "history.sqlite")
    assert archive.periods() == ["2026-W46", "2026-W47"]
    assert len(archive.read_period("2026-W47")) == len(full)
    small = full.index[(full["observed"] >= 1) & (full["observed"] <= 4)]
    assert len(small) > 0  # the demo has small counts
    for table in (pd.read_csv(result.out / "areas.csv", dtype={"area_id": str, "observed": str,
                                                             "week_observed": str}),
                  gpd.read_file(result.out / "areas.gpkg")):
        table = table.set_index("area_id")
        assert (table.loc[small, "observed"] == "<5").all()
        # the rate gives the count back with the population: withheld like the SIR
        withheld = ["sir", "sir_low", "sir_high", "eb_rr", "rate_per_100k", "rate_low", "rate_high"]
        assert table.loc[small, withheld].isna().all().all()
        big = full.index[full["observed"] >= 5]
        assert (table.loc[big, "observed"].astype(int) == full.loc[big, "observed"]).all()
        # the newest week's count of the space-time model is suppressed the same way, with its mid-p values
        small_week = full.index[(full["week_observed"] >= 1) & (full["week_observed"] <= 4)]
        assert len(small_week) > 0
        # "<5", or "withheld" where the window's count (the same week by default) is suppressed too
        assert table.loc[small_week, "week_observed"].astype(str).isin(["<5", "withheld"]).all()
        assert table.loc[small_week, ["forecast_midp", "forecast_q"]].isna().all().all()


# ============================================================================ command line
def _hash_state(out: Path, archive: Path) -> dict:
    return {"out": _folder_hashes(out), "archive": _sha(archive)}


@pytest.fixture
def demo_copy(demo_run, tmp_path):
    """A copy of the demo folder (inputs, archive, bulletin) that a test may break."""
    dest = tmp_path / "demo"
    shutil.copytree(demo_run["folder"], dest)
    return dest


@pytest.mark.slow
@pytest.mark.parametrize("breakage", ["negative count", "unknown key", "period outside data", "missing file"])
def test_bad_input_exits_2_and_changes_nothing(demo_copy, breakage, capsys):
    from areamap.cli import main

    config = demo_copy / "run.toml"
    out = demo_copy / "bulletin"
    args = ["bulletin", str(config), "--out", str(out), "--quiet"]
    if breakage == "negative count":
        cases = pd.read_csv(demo_copy / "cases.csv")
        cases.loc[3, "cases"] = -2
        cases.to_csv(demo_copy / "cases.csv", index=False)
    elif breakage == "unknown key":
        config.write_text(config.read_text().replace("[flags]", "[flags]\nmin_probabilty = 0.9"))
    elif breakage == "period outside data":
        args += ["--period", "2027-W10"]
    else:
        (demo_copy / "population.csv").unlink()
    inputs = {p.name: _sha(p) for p in demo_copy.iterdir() if p.is_file() and p.suffix != ".sqlite"}
    state = _hash_state(out, demo_copy / "history.sqlite")
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
    assert _hash_state(out, demo_copy / "history.sqlite") == state
    assert {p.name: _sha(p) for p in demo_copy.iterdir() if p.is_file() and p.suffix != ".sqlite"} == inputs
    assert not [p for p in demo_copy.iterdir() if p.name.startswith(".bulletin")]  # no temporary folder left


@pytest.mark.slow
def test_internal_failure_exits_1_and_keeps_previous_bulletin(demo_copy, monkeypatch, capsys):
    import areamap.bulletin.page_figures as page_figures
    from areamap.cli import main

    def broken(*args, **kwargs):
        raise RuntimeError("figure engine exploded")

    monkeypatch.setattr(page_figures, "bulletin_figures", broken)
    out = demo_copy / "bulletin"
    state = _hash_state(out, demo_copy / "history.sqlite")
    assert main(["bulletin", str(demo_copy / "run.toml"), "--out", str(out), "--quiet"]) == 1
    assert "internal error: RuntimeError: figure engine exploded" in capsys.readouterr().err
    assert _hash_state(out, demo_copy / "history.sqlite") == state


def test_bulletin_refuses_a_folder_with_other_files(demo_copy, capsys):
    from areamap.cli import main

    # without per-period folders the output folder is replaced: the demo folder holds the inputs, refused
    config = demo_copy / "run.toml"
    text = config.read_text()
    config.write_text(text.replace("[output]", "[output]\nper_period = false", 1))
    assert main(["bulletin", str(config), "--out", str(demo_copy), "--quiet"]) == 2
    assert "contains the" in capsys.readouterr().err


@pytest.mark.slow
def test_history_command(demo_copy, demo_run, capsys):
    from areamap.cli import main

    t = demo_run["result"].to_frame()
    area = str(t.index[t["flag"]][0]) if t["flag"].any() else str(t.index[0])
    assert main(["history", str(demo_copy / "run.toml"), "--area", area]) == 0
    text = capsys.readouterr().out
    lines = [ln for ln in text.splitlines() if area in ln and ln.startswith("20")]
    assert [ln.split()[0] for ln in lines] == ["2026-W46", "2026-W47"]
    assert main(["history", str(demo_copy / "run.toml"), "--last", "1"]) == 0
    text = capsys.readouterr().out
    flagged_now = set(t.index[t["flag"]].astype(str))
    shown = {ln.split()[2] for ln in text.splitlines() if ln.startswith("2026-W47")}
    assert "window_weeks" in text.splitlines()[1]  # the window of each period is shown
    assert all(ln.split()[1] == "1" for ln in text.splitlines() if ln.startswith("2026-W47"))
    assert shown == flagged_now
    assert main(["history", str(demo_copy / "run.toml"), "--area", "NOPE"]) == 2
    assert "not in the history archive" in capsys.readouterr().err


def test_history_without_archive(tmp_path, capsys):
    from areamap.cli import main
    from areamap.demo import write_demo

    config = write_demo(tmp_path)
    assert main(["history", str(config)]) == 2
    assert "No history archive" in capsys.readouterr().err


@pytest.mark.slow
def test_demo_command_runs_two_periods(tmp_path, capsys):
    from areamap.archive import HistoryArchive
    from areamap.cli import main

    assert main(["demo", "--out", str(tmp_path)]) == 0
    assert (tmp_path / "bulletin" / "2026-W46" / "index.html").exists()
    assert (tmp_path / "bulletin" / "latest.html").exists()
    assert HistoryArchive(tmp_path / "history.sqlite").periods() == ["2026-W46", "2026-W47"]
    run = json.loads((tmp_path / "bulletin" / "2026-W47" / "run.json").read_text())
    assert run["period"]["key"] == "2026-W47" and run["flags"]["previous_available"]


@pytest.mark.slow
def test_bad_period_text(demo_copy, capsys):
    from areamap.cli import main

    assert main(["bulletin", str(demo_copy / "run.toml"), "--period", "week 47", "--quiet"]) == 2
    assert "is not an ISO week. Give it as YYYY-Www" in capsys.readouterr().err


def test_warnings_are_recorded_and_passed_on():
    import warnings

    from areamap.bulletin.analysis import _recording_warnings
    from areamap.errors import DataWarning

    store: list[str] = []
    with pytest.warns(DataWarning, match="few cases"):
        with _recording_warnings(store):
            warnings.warn("few cases here", DataWarning, stacklevel=1)
            warnings.warn("few cases here", DataWarning, stacklevel=1)
    assert store == ["few cases here"]
    with pytest.warns(DataWarning, match="before the failure"), pytest.raises(RuntimeError):
        with _recording_warnings(store):
            warnings.warn("before the failure", DataWarning, stacklevel=1)
            raise RuntimeError("boom")


@pytest.mark.slow
def test_external_rates_times_window_weeks(demo_copy):
    """External reference rates per week x window length give the internal expected counts back.

    Indirect standardization identity (Breslow & Day 1987, vol. II ch. 2): with reference rates equal to the
    region's own age-specific weekly rates over the window, E_i = sum_a n_ia * r_a * weeks equals the
    internal-reference expected count.
    """
    import re

    from areamap.bulletin import run_bulletin

    cases = pd.read_csv(demo_copy / "cases.csv")
    pop = pd.read_csv(demo_copy / "population.csv")
    window = ["2026-W46", "2026-W47"]
    per_age = cases[cases["week"].isin(window)].groupby("age_group")["cases"].sum()
    rates = per_age / pop.groupby("age_group")["population"].sum() / len(window) * 100_000
    rates.rename("rate").rename_axis("age_group").reset_index().to_csv(demo_copy / "rates.csv", index=False)
    text = (demo_copy / "run.toml").read_text()
    text = re.sub(r"window_weeks = \d+", "window_weeks = 2", text)
    text = re.sub(r"permutations = \d+", "permutations = 99", text)  # speed: the expected counts are checked
    # other settings than the archive's periods: each run starts its own named series
    text = text.replace("[output]", '[output]\nseries = "two-weeks"', 1)
    internal = run_bulletin(_write_config(demo_copy, "internal.toml", text), out=demo_copy / "b1")
    text = text.replace('reference = "internal"', 'reference = "external"\nrates_file = "rates.csv"')
    text = text.replace('series = "two-weeks"', 'series = "two-weeks-external"')
    external = run_bulletin(_write_config(demo_copy, "external.toml", text), out=demo_copy / "b2")
    assert (demo_copy / "history.two-weeks.sqlite").is_file()
    assert external.window_weeks == 2 and str(external.period_start) == "2026-11-09"
    # rates written with full float precision in CSV: agreement to 1e-9 relative
    np.testing.assert_allclose(external.to_frame()["expected"], internal.to_frame()["expected"], rtol=1e-9)
    np.testing.assert_allclose(internal.to_frame()["observed"].sum(), internal.to_frame()["expected"].sum(),
                               rtol=1e-12)  # internal reference: sum E = sum O


def _write_config(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.slow
def test_analyse_period_writes_nothing_and_reproduces_the_bulletin(demo_run):
    """analyse_period computes what run_bulletin publishes, and changes no file (separation of computing
    from publishing)."""
    from areamap.bulletin import analyse_period

    folder = demo_run["folder"]
    before = {p: _sha(p) for p in folder.rglob("*") if p.is_file()}
    analysis = analyse_period(demo_run["config"], period="2026-W47")
    assert {p: _sha(p) for p in folder.rglob("*") if p.is_file()} == before
    published = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    mine = analysis.to_frame()
    # the archive now holds W47 itself; the comparison is with W46, so flags and changes agree
    for column in ("observed", "expected", "sir", "eb_rr", "rr", "rr_low", "rr_high", "p_above_1", "cluster_p"):
        np.testing.assert_allclose(mine[column].to_numpy(float), published[column].to_numpy(float),
                                   rtol=1e-9)  # CSV holds 10 significant digits
    assert mine["cluster"].tolist() == published["cluster"].tolist()
    assert mine["flag"].tolist() == published["flag"].astype(str).str.lower().eq("true").tolist()
    assert "Analysis of 2026-W47" in analysis.summary()


def test_flag_areas_emerging_and_persistent_reasons():
    # space-time rules: emerging when forecast_q <= forecast_fdr, the probability rule reads "persistent"
    t = pd.DataFrame({"observed": [12, 3, 4], "p_exceed": [0.93, 0.2, 0.1],
                      "cluster": ["not significant"] * 3, "cluster_p": [0.5, 0.5, 0.5],
                      "forecast_midp": [0.2, 0.0004, 0.03], "forecast_q": [0.6, 0.012, 0.06]},
                     index=["A", "B", "C"])
    out = flag_areas(t, rules=FlagRules(forecast_fdr=0.05))
    assert out["flag"].tolist() == [True, True, False]
    assert out.loc["A", "flag_reason"] == "persistent: P(RR/region>1)=0.93 >= 0.8"
    assert out.loc["B", "flag_reason"] == "emerging: newest week above its forecast (mid-p <0.001, FDR q=0.012 <= 0.05)"
    assert "emerging" in FlagRules(forecast_fdr=0.05).describe()
    # without forecast_fdr the forecast columns are ignored (cross-sectional rule as before)
    assert flag_areas(t)["flag"].tolist() == [True, False, False]
    # the multi-week window: the reason names the window that drives the p-value, with that window's mid-p
    w = t.assign(forecast_window=[1, 3, 1], forecast_window_midp=[0.3, 0.0021, 0.2])
    out = flag_areas(w, rules=FlagRules(forecast_fdr=0.05))
    assert out.loc["B", "flag_reason"] == ("emerging: sum of the last 3 weeks above its forecast (mid-p 0.002, "
                                           "FDR q=0.012 <= 0.05)")


# ============================================================================ publication (issue 12)
@pytest.mark.slow
def test_changed_settings_stop_with_exit_2_and_a_way_on(demo_copy, capsys):
    import re

    from areamap.archive import HistoryArchive
    from areamap.cli import main

    config = demo_copy / "run.toml"
    config.write_text(re.sub(r"window_weeks = \d+", "window_weeks = 3", config.read_text()))
    before = _sha(demo_copy / "history.sqlite")
    assert main(["bulletin", str(config), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "window_weeks: 1 in the archive, 3 in this run" in err
    assert "[output] series" in err and "Traceback" not in err
    assert _sha(demo_copy / "history.sqlite") == before
    # the archive records each period's settings (window, model, flag rule)
    recorded = HistoryArchive(demo_copy / "history.sqlite").settings("2026-W47")
    assert recorded["window_weeks"] == 1 and recorded["model"]["model"] == "bym2"
    assert recorded["flags"]["min_probability"] == 0.8


@pytest.mark.slow
def test_rates_per_100k_and_totals_from_the_inputs(demo_run):
    """Crude rate = 100,000 x cases / population (definition) with exact Poisson limits (Garwood 1936,
    via scipy's chi-square quantiles); totals recomputed from cases.csv."""
    import scipy.stats as st

    folder = demo_run["folder"]
    t = pd.read_csv(demo_run["out"] / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    np.testing.assert_allclose(t["rate_per_100k"], 1e5 * t["observed"] / t["population"], rtol=1e-9)
    o = t["observed"].to_numpy()
    low = np.where(o > 0, st.chi2.ppf(0.025, 2 * o) / 2, 0.0)  # Garwood (1936) exact limits
    high = st.chi2.ppf(0.975, 2 * o + 2) / 2
    np.testing.assert_allclose(t["rate_low"], 1e5 * low / t["population"], rtol=1e-6)
    np.testing.assert_allclose(t["rate_high"], 1e5 * high / t["population"], rtol=1e-6)
    cases = pd.read_csv(folder / "cases.csv")
    by_week = cases.groupby("week")["cases"].sum()
    totals = demo_run["result"].run_info["totals"]
    assert totals["current"] == by_week["2026-W47"] == t["observed"].sum()
    assert totals["previous"] == by_week["2026-W46"]
    before = by_week[by_week.index < "2026-W47"].tail(52)
    assert totals["baseline_mean"] == pytest.approx(before.mean(), rel=1e-12)
    np.testing.assert_array_equal(t["observed_previous"], cases[cases["week"] == "2026-W46"].groupby(
        "district_id")["cases"].sum().reindex(t.index, fill_value=0))
    html = (demo_run["out"] / "index.html").read_text(encoding="utf-8")
    assert f"Cases this period: {totals['current']:,}" in html
    assert "818.0 expected" not in html and "expected</li>" not in html


def test_standardized_rate_columns_with_a_standard_population(demo_copy):
    """Directly standardized rates with a standard population: columns in areas.csv next to the crude rate."""
    import re

    from areamap.bulletin import analyse_period

    pop = pd.read_csv(demo_copy / "population.csv")
    std = pop.groupby("age_group")["population"].sum().rename("population").reset_index()
    std.to_csv(demo_copy / "standard.csv", index=False)
    text = (demo_copy / "run.toml").read_text()
    text = text.replace("[standardization]", '[standardization]\nstandard_population_file = "standard.csv"', 1)
    text = re.sub(r"permutations = \d+", "permutations = 99", text)
    (demo_copy / "std.toml").write_text(text)
    a = analyse_period(demo_copy / "std.toml")
    t = a.to_frame()
    # the region's own population as the standard: the region-wide standardized rate equals its crude rate
    # (direct standardization identity, Breslow & Day 1987 vol. II); per district the columns are finite
    assert {"std_rate_per_100k", "std_rate_low", "std_rate_high"} <= set(t.columns)
    assert np.isfinite(t["std_rate_per_100k"]).all()
    assert (t["std_rate_low"] <= t["std_rate_per_100k"]).all() and (t["std_rate_per_100k"] <= t["std_rate_high"]).all()
    # definition of the directly standardized rate: sum_a w_a * c_ia / n_ia with w_a the standard's shares
    cases = pd.read_csv(demo_copy / "cases.csv")
    c = cases[cases["week"] == a.period].pivot_table(index="district_id", columns="age_group", values="cases",
                                                      aggfunc="sum", fill_value=0)
    n = pop.pivot_table(index="district_id", columns="age_group", values="population", aggfunc="sum")
    c = c.reindex(index=n.index, columns=n.columns, fill_value=0)
    w = std.set_index("age_group")["population"].reindex(n.columns)
    dsr = 1e5 * (c / n).mul(w / w.sum(), axis=1).sum(axis=1)
    np.testing.assert_allclose(t["std_rate_per_100k"], dsr.reindex(t.index.astype(str)), rtol=1e-9)


@pytest.mark.slow
def test_prospective_scan_in_the_analysis_finds_the_planted_cluster(demo_run):
    """The demo plants 8 districts at relative risk 2.5 in its last 4 weeks (truth.csv): the prospective scan of
    the last 1..4 weeks must put most of them in its most likely cylinder."""
    import dataclasses

    from areamap.bulletin import analyse_period
    from areamap.config import load_config

    cfg = load_config(demo_run["config"])
    cfg = dataclasses.replace(cfg, scan=dataclasses.replace(cfg.scan, kind="prospective", replicates=99))
    analysis = analyse_period(cfg)
    res = analysis.scan
    assert res.kind == "space-time" and res.significant[0]
    truth = pd.read_csv(demo_run["folder"] / "truth.csv", dtype={"district_id": str}).set_index("district_id")
    planted = set(truth.index[truth["in_planted_cluster"] == 1])
    assert len(planted & set(res.to_frame().loc[1, "members"])) >= 6
    assert analysis.run_info["scan"]["kind"] == "prospective"
    assert analysis.run_info["scan"]["baseline"] == "history"
    inside = analysis.areas.loc[list(res.to_frame().loc[1, "members"])]
    assert inside["flag_reason"].str.contains("inside significant scan zone 1", regex=False).all()


@pytest.mark.slow
def test_kriged_risks_beside_car_estimates(tmp_path):
    """[smoothing] kriging = true adds kriged columns, a two-map figure and the semivariogram; flags unchanged."""
    from areamap.bulletin import KRIGING_COLUMNS, analyse_period, run_bulletin
    from areamap.demo import write_demo

    config = write_demo(tmp_path / "demo")
    text = config.read_text(encoding="utf-8")
    config.write_text(text.replace('threshold = 1.0\n', 'threshold = 1.0\nkriging = true\nkriging_neighbours = 16\n',
                                   1).replace("permutations = 9999", "permutations = 199"), encoding="utf-8")
    out = tmp_path / "bulletin"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = run_bulletin(config, out=out).out  # the period's own folder
        analysis = analyse_period(config)
    table = pd.read_csv(out / "areas.csv", dtype={"area_id": str})
    cols = list(AREA_COLUMNS)
    at = cols.index("p_above_1") + 1
    assert list(table.columns) == cols[:at] + list(KRIGING_COLUMNS) + cols[at:]
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    page = (out / "index.html").read_text(encoding="utf-8")
    if analysis.kriging is None:  # the demo's counts showed no structure: said so, columns blank
        assert "skipped" in run["kriging"] and table["kriged_rr"].isna().all()
        return
    # the columns are the kriging result on the SIR scale (rate per expected case)
    assert_allclose(table["kriged_rr"], analysis.kriging.rate, rtol=1e-9)  # written with 10 significant digits
    assert (table["kriged_rr_low"] <= table["kriged_rr"]).all() and (table["kriged_rr"] <= table["kriged_rr_high"]).all()
    assert run["kriging"]["neighbours"] == 17  # 16 nearest plus the district itself
    assert 'id="fig-kriging"' in page or "Two smoothers side by side" in page
    assert "Poisson kriging" in page and "Kyriakidis" in page
    # flags come from the CAR model only: identical to an analysis without kriging
    plain = config.parent / "plain.toml"
    plain.write_text(config.read_text(encoding="utf-8").replace("kriging = true", "kriging = false"),
                     encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        without = analyse_period(plain)
    assert table["flag"].tolist() == without.areas["flag"].tolist()
    assert "kriged_rr" not in without.areas.columns and without.kriging is None


@pytest.mark.slow
def test_too_few_weeks_fall_back_to_the_window_model_with_a_note(tmp_path):
    """With fewer weeks than [spacetime] min_weeks the flags use the summed-window model and say why."""
    from areamap.bulletin import analyse_period
    from areamap.demo import write_demo

    config = write_demo(tmp_path / "demo")
    config.write_text(config.read_text(encoding="utf-8") + "\n[spacetime]\nweeks = 60\nmin_weeks = 60\n",
                      encoding="utf-8")
    analysis = analyse_period(config)
    info = analysis.run_info["spacetime"]
    assert info["fitted"] is False and "min_weeks = 60" in info["note"]
    assert any("min_weeks = 60" in n for n in analysis.run_info["notes"])
    t = analysis.to_frame()
    assert t["forecast_q"].isna().all() and not t["emerging"].any()
    in_scan = (t["scan_zone"] > 0) & (t["scan_p"] < 0.05)  # the demo's scan rule (high risk only)
    assert (t["flag"] == ((t["p_above_1"] >= 0.8) | (t["cluster"] == "High-High") | in_scan)).all()
    assert analysis.spacetime_fit is None
