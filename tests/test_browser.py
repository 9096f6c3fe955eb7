"""The bulletin page opened in a real browser (headless Chromium driven by ChromeDriver through selenium).

Checks what only a browser can: the page loads offline without console errors, every embedded figure
decodes, the flagged-district table has one row per flagged district, and hostile user text (district
names, title, region) is shown literally instead of being interpreted as markup.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
from pathlib import Path
from unittest import mock

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
    shown = driver.find_element(By.ID, "n-flagged").get_attribute("data-count")
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
    assert driver.execute_script("return document.scripts.length") == 0
    assert "owned" != driver.title and HOSTILE_TITLE in driver.title


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
    assert refs and all(r.startswith("data:") or r.startswith("#") for r in refs)
    assert json.loads((result.out / "run.json").read_text())["period"]["key"] == result.period
