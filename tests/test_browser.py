"""The appendix page opened in a real headless Chromium (Debian's chromium + chromedriver)."""
from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from robustmod.compare import compare
from robustmod.demo import demo_data
from robustmod.report import write_appendix
from robustmod.tables import format_cell

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
HOSTILE_FOCAL = "<script>alert(1)</script>"
HOSTILE_MOD = "50%_&_#$"


@pytest.fixture(scope="module")
def driver(tmp_path_factory: pytest.TempPathFactory):  # noqa: ANN201
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        if os.environ.get("CI"):
            pytest.fail("the browser test needs Debian's chromium and chromium-driver; .ci/run must install them")
        pytest.skip("Debian's chromium and chromium-driver are not installed (apt-get install chromium chromium-driver)")
    opts = webdriver.ChromeOptions()
    opts.binary_location = str(CHROMIUM)
    for arg in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--no-first-run", f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
                "--window-size=1200,900"):
        opts.add_argument(arg)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    drv = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=opts)
    yield drv
    drv.quit()


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An appendix on the invented demo data with hostile column names."""
    df = demo_data().rename(columns={"fertiliser": HOSTILE_FOCAL, "soil_moisture": HOSTILE_MOD})
    c = compare(df, f"grain_yield ~ `{HOSTILE_FOCAL}` * `{HOSTILE_MOD}` + field_slope", HOSTILE_FOCAL, HOSTILE_MOD,
                backends=["ols", "hc3", "hc1"])
    return write_appendix(c, tmp_path_factory.mktemp("browser") / "appendix")


def test_page_renders_without_errors_and_shows_results(driver, page: Path, tmp_path: Path) -> None:  # noqa: ANN001
    from selenium.webdriver.common.by import By

    driver.get((page / "appendix.html").as_uri())
    assert driver.title.startswith("Sensitivity appendix")
    shot = tmp_path / "appendix.png"
    assert driver.save_screenshot(str(shot)) and shot.stat().st_size > 10_000
    logs = driver.get_log("browser")
    assert [e for e in logs if e["level"] in ("SEVERE", "WARNING")] == []

    # No script ran: the hostile column name is shown as text, and no alert is open.
    body = driver.find_element(By.TAG_NAME, "body").text
    assert HOSTILE_FOCAL in body and HOSTILE_MOD in body
    assert driver.execute_script("return document.scripts.length") == 0

    # The product-term numbers on the page are those of results.json.
    res = json.loads((page / "results.json").read_text())
    cells = driver.find_elements(By.CSS_SELECTOR, '[data-field="interaction-estimate"]')
    assert {c.get_attribute("data-backend") for c in cells} == set(res["backends"])
    for cell in cells:
        est = res["backends"][cell.get_attribute("data-backend")]["interaction"]["estimate"]
        assert json.loads(cell.get_attribute("data-value")) == est
        assert cell.text == format_cell(est, "number", unicode_minus=True)
    for cell in driver.find_elements(By.CSS_SELECTOR, '[data-field="interaction-p"]'):
        p = res["backends"][cell.get_attribute("data-backend")]["interaction"]["p"]
        assert json.loads(cell.get_attribute("data-value")) == p

    # The verdict a reader sees without the terminal, and every embedded figure decoded.
    verdict = driver.find_element(By.ID, "verdict")
    assert verdict.get_attribute("data-survives") == ("true" if res["summary"]["survives"] else "false")
    assert driver.find_element(By.ID, "summary-sentence").text == res["summary"]["sentence"]
    images = driver.find_elements(By.CSS_SELECTOR, "figure img")
    assert len(images) == len(list((page / "figures").glob("*.png"))) >= 4
    for img in images:
        assert driver.execute_script("return arguments[0].complete && arguments[0].naturalWidth", img) > 300


def test_page_prints(driver, page: Path, tmp_path: Path) -> None:  # noqa: ANN001
    import base64

    driver.get((page / "appendix.html").as_uri())
    pdf = base64.b64decode(driver.print_page())
    assert pdf[:5] == b"%PDF-" and len(pdf) > 50_000
    assert [e for e in driver.get_log("browser") if e["level"] == "SEVERE"] == []
