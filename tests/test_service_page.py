"""The web page in a real headless browser (Debian's chromium and
chromium-driver, driven by Selenium) against a real ``warmstart serve`` on
127.0.0.1: the page loads, lists the studies of a seeded archive, and a study
link opens its best-so-far curve. ``.ci/run`` installs the browser when it is
missing; without it the test says so and is skipped.
"""

from __future__ import annotations

import shutil

import pytest

from service_support import ServerProcess, seed_archive

pytest.importorskip("selenium", reason="the page test needs selenium (pip install -e '.[test]')")

CHROMIUM = shutil.which("chromium")
DRIVER = shutil.which("chromedriver")
pytestmark = pytest.mark.skipif(not (CHROMIUM and DRIVER),
                                reason="needs Debian's chromium and chromium-driver (.ci/run installs them)")


@pytest.fixture
def browser():
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--disable-gpu",
                 "--window-size=1200,900", "--no-first-run", "--disable-extensions"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path=DRIVER), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


def test_the_page_lists_studies_and_a_study_link_opens_its_curve(tmp_path, browser):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as EC
    from selenium.webdriver.support.ui import WebDriverWait

    path = tmp_path / "team.duckdb"
    studies = seed_archive(path)
    with ServerProcess(path) as server:
        browser.get(server.url + "/")
        assert browser.title == "warmstart: studies"
        rows = browser.find_elements(By.CSS_SELECTOR, "table#studies tbody tr")
        assert len(rows) == len(studies) == 3
        assert {r.find_elements(By.TAG_NAME, "td")[1].text for r in rows} == {"shop 1", "shop 2", "shop 3"}
        # filter by owner through the form
        browser.find_element(By.NAME, "owner").send_keys("lee")
        browser.find_element(By.CSS_SELECTOR, "form button").click()
        # the form loads a new page: wait until the old table is gone before reading rows
        WebDriverWait(browser, 60).until(EC.staleness_of(rows[0]))
        rows = browser.find_elements(By.CSS_SELECTOR, "table#studies tbody tr")
        assert [r.find_elements(By.TAG_NAME, "td")[1].text for r in rows] == ["shop 2"]
        rows[0].find_element(By.LINK_TEXT, str(studies[1])).click()
        WebDriverWait(browser, 60).until(EC.staleness_of(rows[0]))
        assert browser.title == f"study {studies[1]}: bran on shop 2"
        line = browser.find_element(By.CSS_SELECTOR, "svg#curve polyline.series")
        assert line.get_attribute("data-label") == "best so far"
        assert len(line.get_attribute("points").split()) == 24  # one point per trial
        assert len(browser.find_elements(By.CSS_SELECTOR, "table#best tbody tr")) == 10
        browser.save_screenshot(str(tmp_path / "study.png"))
        browser.find_element(By.PARTIAL_LINK_TEXT, "shop 2").click()
        WebDriverWait(browser, 60).until(EC.title_is("neighbors of shop 2"))
        assert browser.title == "neighbors of shop 2"
        assert len(browser.find_elements(By.CSS_SELECTOR, "table#neighbors tbody tr")) == 2
        browser.get(server.url + "/gain")
        assert "no gain report yet" in browser.find_element(By.ID, "gain").text
        browser.save_screenshot(str(tmp_path / "page.png"))
