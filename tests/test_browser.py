"""The bulletin page opened in a real browser (headless Chromium driven by ChromeDriver through selenium).

Checks what only a browser can: the page loads offline without console errors, every embedded figure
decodes, the flagged-district table has one row per flagged district, hostile user text (district
names, title, region) is shown literally instead of being interpreted as markup, figure text is at least
9 px as displayed on a 1400 px screen and in an A4 print layout, and the explorable map answers pointer,
tap and keyboard focus with the numbers of areas.csv.

These tests need Debian's ``chromium`` and ``chromium-driver`` (``.ci/run`` installs them); they are skipped
with a reason elsewhere.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
from pathlib import Path
from unittest import mock

import numpy as np
import pandas as pd
import pytest

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"
HOSTILE_NAME = '<b>Fernwick & "Co"</b>'
HOSTILE_TITLE = '<script>document.title="owned"</script> Weekly bulletin'
HOSTILE_REGION = "Vale & <i>Thessery</i>"
FLAGS = ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic")


def _missing_browser() -> str | None:
    if not (os.path.exists(CHROMIUM) and os.access(CHROMIUM, os.X_OK)):
        return f"chromium not found at {CHROMIUM} (Debian package 'chromium'; CI installs it)"
    if not (os.path.exists(CHROMEDRIVER) and os.access(CHROMEDRIVER, os.X_OK)):
        return f"chromedriver not found at {CHROMEDRIVER} (Debian package 'chromium-driver'; CI installs it)"
    try:
        import selenium  # noqa: F401
    except ImportError:
        return "selenium is not installed (pip install -e '.[test]')"
    return None


@pytest.fixture(scope="module")
def hostile_bulletin(tmp_path_factory):
    """Demo copy with a hostile title, region and district name given to a flagged district."""
    import geopandas as gpd

    from areamap.bulletin import run_bulletin
    from areamap.demo import write_demo

    folder = tmp_path_factory.mktemp("hostile")
    config = write_demo(folder)
    text = config.read_text(encoding="utf-8")
    # TOML literal strings ('...') hold the hostile text without escaping
    text = text.replace('title = "Weekly respiratory infection bulletin"', f"title = '{HOSTILE_TITLE}'")
    text = text.replace('region = "Vale of Thessery"', f"region = '{HOSTILE_REGION}'")
    config.write_text(text, encoding="utf-8")
    # the planted-cluster district with the most cases in the last week (relative risk 2.5 by
    # construction, so it is flagged; the flagged-table checks below would fail loudly otherwise)
    truth = pd.read_csv(folder / "truth.csv", dtype={"district_id": str})
    cases = pd.read_csv(folder / "cases.csv", dtype={"district_id": str})
    last = cases[cases["week"] == cases["week"].max()].groupby("district_id")["cases"].sum()
    planted = truth.loc[truth["in_planted_cluster"] == 1, "district_id"]
    target = str(last.reindex(planted).idxmax())
    gdf = gpd.read_file(folder / "districts.gpkg")
    gdf.loc[gdf["district_id"].astype(str) == target, "district_name"] = HOSTILE_NAME
    gdf.to_file(folder / "districts.gpkg", layer="districts", driver="GPKG")
    result = run_bulletin(config, out=folder / "bulletin")
    assert bool(result.to_frame().loc[target, "flag"]), "the chosen planted district should be flagged"
    return result, target


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    reason = _missing_browser()
    if reason:
        pytest.skip(reason)
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    with mock.patch.dict(os.environ, {"SE_OFFLINE": "true"}):  # never let selenium look for drivers online
        driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=options)
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="module")
def page(browser, hostile_bulletin):
    result, target = hostile_bulletin
    browser.get((result.out / "index.html").as_uri())
    browser.execute_script("return document.readyState")
    return browser, result, target


def test_no_console_errors(page):
    driver, _, _ = page
    severe = [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]
    assert severe == []


def test_every_image_decodes(page):
    driver, _, _ = page
    images = driver.execute_script(
        "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, i.naturalHeight]);")
    assert len(images) >= 5  # raw/smoothed maps, uncertainty map, risk-and-certainty map, cluster map, funnel plot
    assert all(done and w > 0 and h > 0 for done, w, h in images)


def test_flagged_rows_equal_flagged_count(page):
    from selenium.webdriver.common.by import By

    driver, result, _ = page
    rows = driver.find_elements(By.CSS_SELECTOR, "#flagged-table tbody tr.flagged-row")
    n_flagged = int(result.to_frame()["flag"].sum())
    assert len(rows) == n_flagged == result.run_info["flags"]["total"]
    shown = driver.find_element(By.ID, "headline-flagged").get_attribute("data-count")
    assert int(shown) == n_flagged


def test_hostile_text_renders_literally(page):
    from selenium.webdriver.common.by import By

    driver, _, target = page
    cell = driver.find_element(By.CSS_SELECTOR, f'tr[data-area-id="{target}"] .area-name')
    assert cell.text == HOSTILE_NAME
    assert driver.find_elements(By.CSS_SELECTOR, "#flagged-table b") == []  # no element was created
    assert driver.find_element(By.ID, "title").text == HOSTILE_TITLE
    assert driver.find_element(By.ID, "region").text == HOSTILE_REGION
    assert driver.find_elements(By.CSS_SELECTOR, "#region i") == []
    # the only script is the page's own: the explorable map's inline script
    kinds = driver.execute_script("return Array.from(document.scripts).map(s => [s.type, s.src]);")
    assert kinds == [["", ""]]
    assert "owned" != driver.title and HOSTILE_TITLE in driver.title
    # the hostile name reaches the explorable map as text too
    path = driver.find_element(By.CSS_SELECTOR, f'#explore path[data-id="{target}"]')
    assert path.get_attribute("aria-label") == HOSTILE_NAME


def test_prints_to_a4(page):
    from selenium.webdriver.common.print_page_options import PrintOptions

    driver, _, _ = page
    opts = PrintOptions()
    opts.page_width, opts.page_height = 21.0, 29.7  # A4 in centimetres
    pdf = base64.b64decode(driver.print_page(opts))
    assert pdf.startswith(b"%PDF")
    assert pdf.count(b"/Type /Page\n") + pdf.count(b"/Type /Page ") + pdf.count(b"/Type/Page") >= 2


def test_page_is_self_contained(hostile_bulletin):
    result, _ = hostile_bulletin
    html = Path(result.out / "index.html").read_text(encoding="utf-8")
    # no external resources: every src/href is a data: URI (or an in-page anchor)
    import re

    refs = re.findall(r'(?:src|href)="([^"]*)"', html)
    # embedded (data:), in-page (#) or relative links to the run's own files; nothing from elsewhere
    local = [r for r in refs if not (r.startswith("data:") or r.startswith("#"))]
    assert sorted(local) == ["../latest.html", "areas.csv", "areas.gpkg", "run.json"]
    assert all((result.out / r).resolve().is_file() for r in local)
    assert json.loads((result.out / "run.json").read_text())["period"]["key"] == result.period


# ------------------------------------------------------------------------- legibility
def _figure_text_px(driver) -> dict[str, float]:
    """Smallest text of each figure as displayed, in CSS px: the smallest font (pt) drawn in the figure
    times image pixels per pt (the PNG's dpi / 72) times the displayed-to-natural width ratio."""
    return driver.execute_script("""
        const out = {};
        document.querySelectorAll('figure[data-min-text-pt]').forEach(f => {
          const img = f.querySelector('img');
          out[f.id] = parseFloat(f.dataset.minTextPt) * parseFloat(f.dataset.pxPerPt) * img.getBoundingClientRect().width
                      / img.naturalWidth;
        });
        return out;""")


def test_figure_text_is_at_least_9px_on_screen_and_in_a4_print(page):
    driver, _, _ = page
    driver.set_window_size(1400, 1000)
    screen = _figure_text_px(driver)
    assert len(screen) >= 7  # locator, weekly curve and the five maps and plots
    assert min(screen.values()) >= 9, screen
    # A4 portrait with the page's 12 mm side margins: 186 mm = 703 CSS px of content width
    driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": "print"})
    try:
        driver.set_window_size(703, 1000)
        printed = _figure_text_px(driver)
    finally:
        driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": ""})
        driver.set_window_size(1400, 1000)
    assert min(printed.values()) >= 9, printed


def test_alt_texts_state_findings(page):
    driver, result, _ = page
    alts = driver.execute_script(
        "return Object.fromEntries(Array.from(document.querySelectorAll('figure img')).map("
        "i => [i.closest('figure').id, i.alt]));")
    t = result.to_frame()
    n_high = int((t["p_above_1"] > 0.8).sum())
    assert f"{n_high} of {len(t)} districts above 0.8" in alts["fig-uncertainty"]
    assert str(int(t["observed"].sum())) in alts["fig-trend"]
    assert all(len(a) > 60 for a in alts.values())


# ------------------------------------------------------------------------- explorable map
def _panel(driver) -> tuple[str, dict[str, str]]:
    return driver.execute_script("""
        const p = document.querySelector('#explore .explore-panel');
        const vals = {};
        p.querySelectorAll('dd').forEach(d => { vals[d.dataset.key] = d.textContent; });
        return [p.dataset.id, vals];""")


def _expected_panel(row) -> dict[str, str]:
    hidden = 1 <= row["observed"] < 5
    if hidden:  # the page withholds a suppressed district's expected count and estimates (disclosure rule)
        return {"observed": "<5", "expected": "withheld", "rr": "withheld"}
    return {"observed": str(int(row["observed"])), "expected": f"{row['expected']:.1f}",
            "rr": f"{row['rr']:.2f} ({row['rr_low']:.2f}–{row['rr_high']:.2f})"}


def test_explorable_map_answers_hover_tap_and_focus_with_the_csv_numbers(page):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By

    driver, result, _ = page
    csv = pd.read_csv(result.out / "areas.csv", dtype={"area_id": str}).set_index("area_id")
    driver.set_window_size(1400, 1000)
    paths = driver.find_elements(By.CSS_SELECTOR, "#explore path[data-id]")
    assert len(paths) == len(csv)
    by_id = {p.get_attribute("data-id"): p for p in paths}
    big = csv.index[csv["observed"] >= 5]
    hover_id, tap_id, focus_id = big[0], big[len(big) // 2], csv.index[(csv["observed"] >= 1) & (csv["observed"] < 5)][0]
    # pointer
    driver.execute_script("arguments[0].scrollIntoView({block: 'center'});", by_id[hover_id])
    ActionChains(driver).move_to_element(by_id[hover_id]).perform()
    shown_id, vals = _panel(driver)
    assert shown_id == hover_id
    for k, v in _expected_panel(csv.loc[hover_id]).items():
        assert vals[k] == v, (k, vals[k], v)
    # tap (a click)
    driver.execute_script("arguments[0].dispatchEvent(new MouseEvent('click', {bubbles: true}));", by_id[tap_id])
    shown_id, vals = _panel(driver)
    assert shown_id == tap_id and vals["observed"] == str(int(csv.loc[tap_id, "observed"]))
    # keyboard focus (tabindex=0 on every district); a small count stays suppressed in the panel
    driver.execute_script("arguments[0].focus();", by_id[focus_id])
    shown_id, vals = _panel(driver)
    assert shown_id == focus_id
    assert vals == {**vals, **_expected_panel(csv.loc[focus_id])} and vals["observed"] == "<5"
    assert by_id[focus_id].get_attribute("tabindex") == "0"


def test_full_table_is_collapsed_and_sorts(page):
    from selenium.webdriver.common.by import By

    driver, result, _ = page
    details = driver.find_element(By.CSS_SELECTOR, "#explore details")
    assert details.get_attribute("open") is None  # collapsed by default
    rows = driver.find_elements(By.CSS_SELECTOR, "#explore table tbody tr")
    assert len(rows) == len(result.areas)
    driver.execute_script("arguments[0].open = true;", details)
    header = driver.find_element(By.CSS_SELECTOR, '#explore thead button[data-col="5"]')  # smoothed RR
    header.click()
    values = driver.execute_script(
        "return Array.from(document.querySelectorAll('#explore tbody tr')).map(r => parseFloat(r.cells[5].dataset.sort));")
    assert values == sorted(values)
    header.click()
    values = driver.execute_script(
        "return Array.from(document.querySelectorAll('#explore tbody tr')).map(r => parseFloat(r.cells[5].dataset.sort));")
    assert values == sorted(values, reverse=True)
    # sort keys carry 7 significant digits
    np.testing.assert_allclose(sorted(values), np.sort(result.to_frame()["rr"].to_numpy()), rtol=1e-6)
