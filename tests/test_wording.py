"""Tests of the bulletin's string catalogue (areamap.bulletin.wording) and the public-audience page."""

from __future__ import annotations

import dataclasses
import re
import string

import pytest

from areamap.bulletin.wording import PUBLIC, STRINGS, load_wording
from areamap.errors import ConfigError, ParameterError


def test_public_wording_replaces_notation_only():
    assert set(PUBLIC) <= set(STRINGS)
    pub = load_wording("public")
    notation = re.compile(r"P\(RR|CrI|FDR q")
    for key in ("col_rr", "col_prob", "reason_probability", "reason_cluster", "flag_rule", "moran_line"):
        assert not notation.search(pub.text(key, **{f: "x" for _, f, _, _ in string.Formatter().parse(PUBLIC[key])
                                                     if f}))
    assert pub.text("reason_probability", cut_pct="80%", p_pct="93%") == "likely raised: at least 80% probability (93%)"


def test_cluster_names_match_the_map_legend():
    from areamap.maps import CLUSTER_STYLE

    assert load_wording().cluster_names() == {k: v["name"] for k, v in CLUSTER_STYLE.items()}


def test_dates_iso_by_default_and_configurable():
    assert load_wording().date("2026-11-16") == "2026-11-16"  # ISO 8601 calendar date
    assert load_wording(date_format="%d.%m.%Y").date("2026-11-16") == "16.11.2026"


def test_strings_file_overrides_and_checks(tmp_path):
    f = tmp_path / "de.toml"
    f.write_text('flagged_title = "Auffällige Bezirke"\nheadline_flagged = "{n} von {total} Bezirken auffällig."\n',
                 encoding="utf-8")
    w = load_wording(strings_file=f)
    assert w.text("flagged_title") == "Auffällige Bezirke"
    assert w.text("headline_flagged", n=3, total=40) == "3 von 40 Bezirken auffällig."
    f.write_text('flagged_titel = "x"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="unknown key\\(s\\) flagged_titel"):
        load_wording(strings_file=f)
    f.write_text('headline_flagged = "{count} flagged"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="may only use the placeholders"):
        load_wording(strings_file=f)
    with pytest.raises(ParameterError, match="The 'audience' parameter of load_wording"):
        load_wording("experts")


@pytest.mark.slow
def test_public_page_uses_plain_words_and_keeps_figures(tmp_path):
    """The same analysis rendered for a public audience: no statistical notation in the flagged table,
    the same numbers; dates in the configured format."""
    from areamap.bulletin import analyse_period
    from areamap.bulletin.render import render_bulletin
    from areamap.demo import write_demo

    config = write_demo(tmp_path / "demo")
    text = config.read_text().replace("permutations = 9999", "permutations = 199")
    config.write_text(text.replace("[output]", '[output]\naudience = "public"\ndate_format = "%d/%m/%Y"', 1))
    a = analyse_period(config)
    assert a.config.output.audience == "public"
    pub = tmp_path / "public"
    pub.mkdir()
    render_bulletin(a, pub)
    spec = tmp_path / "specialist"
    spec.mkdir()
    cfg = dataclasses.replace(a.config, output=dataclasses.replace(a.config.output, audience="specialist",
                                                                   date_format="%Y-%m-%d"))
    render_bulletin(dataclasses.replace(a, config=cfg), spec)
    html_pub = (pub / "index.html").read_text(encoding="utf-8")
    html_spec = (spec / "index.html").read_text(encoding="utf-8")
    table_pub = re.search(r'<table id="flagged-table">.*?</table>', html_pub, flags=re.DOTALL).group(0)
    table_spec = re.search(r'<table id="flagged-table">.*?</table>', html_spec, flags=re.DOTALL).group(0)
    assert "P(RR" in table_spec and "CrI" in table_spec
    assert "P(RR" not in table_pub and "CrI" not in table_pub
    assert "FDR q" not in table_pub
    assert "likely raised: at least 80% probability" in table_pub
    # the exact figures stay: same observed counts and smoothed risks in both tables
    nums = r'<td class="num (?:observed|rr)">([^<]*)'
    assert re.findall(nums, table_pub) == re.findall(nums, table_spec)
    assert "16/11/2026" in html_pub and "2026-11-16" in html_spec
