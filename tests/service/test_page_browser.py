"""The HTML pages in a real headless Chromium, against a real ``sorbrank serve``
(embedded mode, open on loopback) over HTTP.

Needs Debian's ``chromium`` and ``chromium-driver`` packages and selenium.
Selenium is pointed at /usr/bin/chromedriver and runs offline, so nothing is
ever downloaded. Without them the test is skipped with the reason, except
under CI=true, where a missing browser is a failure rather than a silent pass.
Screenshots go to test-artifacts/ at the repository root.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import tempfile

import pytest
import requests

from conftest import ROOT, clean_env, isotherm, json_batch, start_server, wait_until

pytestmark = pytest.mark.integration

CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
ARTIFACTS = ROOT / "test-artifacts"
WAIT_S = 60  # upper bound for any page or image to appear; never asserted on
R_J_PER_MOL_K = 8.314462618
# markup in an id must show up as text, never as an element
AWKWARD_SORBENT = 'ESC<b>1&"x'
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--window-size=1366,900")


def browser_missing() -> str | None:
    missing = [path for path in (CHROMIUM, CHROMEDRIVER) if not os.access(path, os.X_OK)]
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("the selenium Python package")
    if not missing:
        return None
    return ("headless browser test needs " + ", ".join(missing) + ": apt-get install chromium "
            "chromium-driver; pip install selenium")


@pytest.fixture
def browser():
    reason = browser_missing()
    if reason:
        if os.environ.get("CI") == "true":
            pytest.fail(reason)
        pytest.skip(reason)
    os.environ["SE_OFFLINE"] = "true"  # Selenium Manager must never fetch a driver
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="sorbrank-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in CHROMIUM_FLAGS + (f"--user-data-dir={profile}",):
        options.add_argument(flag)
    driver = webdriver.Chrome(options=options, service=Service(CHROMEDRIVER))
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


@pytest.fixture
def server(tmp_path, processes):
    """An open (token-less) embedded server on loopback with two finished batches."""
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    PYTHONPATH=str(ROOT))
    _, url = start_server(env, tmp_path / "logs", processes)
    api = url + "/api/v1"
    gas = [isotherm(sorbent, q_sat, b * math.exp(30_000 / R_J_PER_MOL_K * (1 / t - 1 / 298.15)),
                    temperature_k=t)
           for sorbent, q_sat, b in (("PAGE-A", 4.0, 0.05), (AWKWARD_SORBENT, 2.0, 0.2))
           for t in (273.15, 298.15, 323.15)]
    # CH4: one sorbent at the default conditions (1 -> 0.1 bar), one in a batch
    # whose adsorption pressure (5 bar) lies beyond its data (measured to 1 bar)
    gas.append(isotherm("PAGE-NEAR", 1.0, 0.05, adsorbate="CH4"))
    far = {"units": {"pressure": "kPa", "loading": "mol/kg"}, "batch_label": "page-far",
           "isotherms": [isotherm("PAGE-FAR", 6.0, 0.05, adsorbate="CH4")],
           "conditions": {"adsorption_pressure_bar": 5.0, "desorption_pressure_bar": 0.1}}
    bodies = [((ROOT / "sample_batches" / "b06_n2_77k_relative.csv").read_bytes(), "text/csv"),
              (json_batch(gas, label="page-gas"), "application/json"),
              (json.dumps(far).encode(), "application/json")]
    for body, content_type in bodies:
        resp = requests.post(api + "/batches", data=body, timeout=60,
                             headers={"Content-Type": content_type})
        assert resp.status_code == 202, resp.text
        status_url = url + resp.json()["status_url"]
        wait_until(lambda: requests.get(status_url, timeout=10).json()["state"] == "done",
                   "a batch to finish", processes, timeout_s=180)
    return url


def column_texts(driver, column: str) -> list[str]:
    from selenium.webdriver.common.by import By

    return [td.text for td in driver.find_elements(By.CSS_SELECTOR,
                                                   f"#rankings tbody td.col-{column}")]


def load_fresh(driver, action, wait):
    """Run ``action`` (a click or submit) and wait until the old page is gone."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec

    old = driver.find_element(By.TAG_NAME, "html")
    action()
    wait.until(ec.staleness_of(old))


def image_loaded(driver, img) -> bool:
    return bool(driver.execute_script(
        "return arguments[0].complete && arguments[0].naturalWidth > 0", img))


def test_overview_filter_sort_and_sorbent_page(server, browser):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select, WebDriverWait

    wait = WebDriverWait(browser, WAIT_S)
    ARTIFACTS.mkdir(exist_ok=True)

    browser.get(server + "/")
    gases = column_texts(browser, "adsorbate")
    assert gases, "the rankings table has no rows"
    # the first page (50 rows, loading at p_ads descending) holds the 77 K N2
    # rows; the CO2 rows come into view only through the filter below
    assert "N2" in set(gases)
    assert browser.find_elements(By.CSS_SELECTOR, "#batches tbody tr")
    assert all("done" in cell.text for cell in
               browser.find_elements(By.CSS_SELECTOR, "#batches td.state"))
    browser.save_screenshot(str(ARTIFACTS / "page-overview.png"))

    # filter: only CO2 rows remain, and they are exactly the six posted
    form = browser.find_element(By.ID, "filters")
    Select(form.find_element(By.NAME, "adsorbate")).select_by_value("CO2")
    load_fresh(browser, form.find_element(By.CSS_SELECTOR, "button[type=submit]").click, wait)
    assert "adsorbate=CO2" in browser.current_url
    assert column_texts(browser, "adsorbate") == ["CO2"] * 6
    assert sorted(set(column_texts(browser, "sorbent_id"))) == sorted(["PAGE-A", AWKWARD_SORBENT])

    # sort: a header click orders by temperature, highest first, keeping the filter
    header = browser.find_element(By.CSS_SELECTOR, "#rankings th.col-temperature_k a")
    load_fresh(browser, header.click, wait)
    temperatures = [float(t) for t in column_texts(browser, "temperature_k")]
    assert temperatures == sorted(temperatures, reverse=True) and len(temperatures) == 6
    assert browser.find_element(By.CSS_SELECTOR, "#rankings th.col-temperature_k") \
        .get_attribute("aria-sort") == "descending"
    assert column_texts(browser, "adsorbate") == ["CO2"] * 6

    # an id full of markup is shown as text and creates no element
    assert not browser.find_elements(By.CSS_SELECTOR, "#rankings tbody b")

    # the sorbent page: its plots load, its fit table marks the selected model
    link = browser.find_element(By.LINK_TEXT, "PAGE-A")
    load_fresh(browser, link.click, wait)
    assert "PAGE-A" in browser.find_element(By.TAG_NAME, "h1").text
    plot = browser.find_element(By.CSS_SELECTOR, "img.isotherm-plot")
    wait.until(lambda d: image_loaded(d, plot))
    qst = browser.find_element(By.CSS_SELECTOR, "#isosteric-heat img")
    wait.until(lambda d: image_loaded(d, qst))
    selected = browser.find_elements(By.CSS_SELECTOR, "table.fits tr.selected")
    assert len(selected) == 3  # one per CO2 isotherm
    assert all("selected" in row.text.lower() for row in selected)
    browser.save_screenshot(str(ARTIFACTS / "page-sorbent.png"))

    # the awkward sorbent's page works through its URL-encoded id
    browser.get(server + "/?adsorbate=CO2")
    load_fresh(browser, browser.find_element(By.LINK_TEXT, AWKWARD_SORBENT).click, wait)
    assert AWKWARD_SORBENT in browser.find_element(By.TAG_NAME, "h1").text
    assert not browser.find_elements(By.CSS_SELECTOR, "h1 b")
    plot = browser.find_element(By.CSS_SELECTOR, "img.isotherm-plot")
    wait.until(lambda d: image_loaded(d, plot))


def test_default_ranking_shows_conditions_marks_unreliable_and_mixed_rows(server, browser):
    """The default sort is the loading at p_ads; PAGE-FAR's larger loading is
    an extrapolation (5 bar, data to 1 bar): marked, ranked last, first only
    when asked; the two batches' conditions are shown and the mix is announced."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    wait = WebDriverWait(browser, WAIT_S)
    ARTIFACTS.mkdir(exist_ok=True)
    browser.get(server + "/?adsorbate=CH4")
    assert browser.find_element(By.CSS_SELECTOR, "#rankings th.col-loading_ads_mol_per_kg") \
        .get_attribute("aria-sort") == "descending"
    assert column_texts(browser, "sorbent_id") == ["PAGE-NEAR", "PAGE-FAR"]
    loading = column_texts(browser, "loading_ads_mol_per_kg")
    assert "unreliable" not in loading[0] and "unreliable" in loading[1]
    assert column_texts(browser, "conditions") == ["1→0.1 bar, 298.15 K", "5→0.1 bar, 298.15 K"]
    notice = browser.find_element(By.ID, "mixed-conditions")
    assert notice.is_displayed() and "2 different sets of conditions" in notice.text
    assert "p_ads 1 bar, 298.15 K: 1 row" in notice.text and "p_ads 5 bar" in notice.text
    assert "come after the rest" in browser.find_element(By.ID, "unreliable-rule").text
    browser.save_screenshot(str(ARTIFACTS / "page-default-ranking.png"))

    load_fresh(browser, browser.find_element(By.LINK_TEXT, "Rank them in place").click, wait)
    assert "unreliable_last=false" in browser.current_url
    assert column_texts(browser, "sorbent_id") == ["PAGE-FAR", "PAGE-NEAR"]
    # one sorbent, one batch: one set of conditions, no notice
    browser.get(server + "/?adsorbate=CH4&temperature_k=298.15&flag=extrapolated_adsorption_pressure")
    assert column_texts(browser, "sorbent_id") == ["PAGE-FAR"]
    assert not browser.find_elements(By.ID, "mixed-conditions")


def test_bad_filter_gives_an_html_error_page(server, browser):
    from selenium.webdriver.common.by import By

    browser.get(server + "/?temperature_k=lukewarm")
    assert "400" in browser.find_element(By.TAG_NAME, "h1").text
    assert browser.find_element(By.LINK_TEXT, "Back to the rankings")
    resp = requests.get(server + "/sorbents/NOT-THERE", timeout=10)
    assert resp.status_code == 404 and resp.headers["Content-Type"].startswith("text/html")
