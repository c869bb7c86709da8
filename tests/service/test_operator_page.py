"""The operator page in headless Chromium (Debian's, driven by Selenium with an explicit chromedriver, so nothing is
downloaded) against the real server: sign in, upload, see the verdict and overlay, review, watch the queue empty."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import httpx
import pytest
from service_testkit import ADMIN_AUTH, OUTPUT, STATION, png_bytes

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--no-first-run",
    "--disable-sync",
    "--window-size=1200,1500",
]


def _unavailable(why: str):
    if os.environ.get("KNOWNGOOD_REQUIRE_BROWSER") == "1":
        pytest.fail(f"KNOWNGOOD_REQUIRE_BROWSER=1 but {why}")
    pytest.skip(why)


@pytest.fixture
def browser(tmp_path):
    if not (CHROMIUM.is_file() and CHROMEDRIVER.is_file()):
        _unavailable(f"{CHROMIUM} or {CHROMEDRIVER} is missing (apt-get install chromium chromium-driver)")
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        _unavailable("selenium is not installed (it is in the project's `test` extra)")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in [*FLAGS, f"--user-data-dir={tmp_path / 'chromium-profile'}"]:
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path=str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(30)
    yield driver
    driver.quit()


def _screenshot(driver, tmp_path: Path, name: str) -> Path:
    shot = tmp_path / name
    driver.save_screenshot(str(shot))
    OUTPUT.mkdir(exist_ok=True)
    shutil.copyfile(shot, OUTPUT / name)  # a stable place: tests/service/output/ (git-ignored)
    return shot


def test_operator_signs_in_inspects_and_reviews(browser, live_server, tiny_good_images, tmp_path):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    # threshold 0 makes every part flagged, so the review queue has something in it
    r = httpx.put(
        live_server.url + "/v1/model/threshold", json={"threshold": 0.0, "operator": "test"}, headers=ADMIN_AUTH
    )
    assert r.status_code == 200
    image = tmp_path / "part.png"
    image.write_bytes(png_bytes(tiny_good_images[0]))
    wait = WebDriverWait(browser, 20)
    find = browser.find_element

    browser.get(live_server.url + "/")
    assert "decision support" in find(By.ID, "caution").text
    find(By.ID, "token").send_keys(STATION)
    find(By.ID, "operator").send_keys("Kim")
    find(By.ID, "sign-in").click()
    wait.until(lambda d: find(By.ID, "app").is_displayed())
    assert browser.execute_script("return sessionStorage.getItem('knowngood.token')") == STATION
    assert browser.execute_script("return localStorage.length") == 0

    find(By.ID, "file").send_keys(str(image))
    find(By.ID, "part-id").send_keys("P-0001")
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: find(By.ID, "verdict").text.lower() == "flag")
    assert float(find(By.ID, "score").text) > float(find(By.ID, "threshold").text) == 0.0
    wait.until(lambda d: find(By.ID, "queue-count").text == "1")
    wait.until(
        lambda d: d.execute_script(
            "const i = document.getElementById('overlay');return i.complete && i.naturalWidth === 32"
        )
    )
    assert "P-0001" in find(By.ID, "queue-rows").text
    _screenshot(browser, tmp_path, "operator_page.png")

    find(By.ID, "review-defective").click()
    wait.until(lambda d: find(By.ID, "queue-count").text == "0")
    assert "defective by Kim" in find(By.ID, "review-state").text
    assert find(By.ID, "queue-empty").is_displayed()
    wait.until(lambda d: "defective" in find(By.ID, "recent-rows").text)
    shot = _screenshot(browser, tmp_path, "operator_page_reviewed.png")
    assert shot.stat().st_size > 10_000

    stored = httpx.get(live_server.url + "/v1/inspections?limit=5", headers=ADMIN_AUTH).json()["items"]
    assert [(i["part_id"], i["review"]["label"], i["review"]["operator"]) for i in stored] == [
        ("P-0001", "defective", "Kim")
    ]


def test_a_bad_token_is_refused_on_the_page(browser, live_server):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    browser.get(live_server.url + "/")
    browser.find_element(By.ID, "token").send_keys("not-the-right-token")
    browser.find_element(By.ID, "sign-in").click()
    WebDriverWait(browser, 20).until(lambda d: d.find_element(By.ID, "message").is_displayed())
    assert "not recognised" in browser.find_element(By.ID, "message").text
    assert not browser.find_element(By.ID, "app").is_displayed()
    assert browser.execute_script("return sessionStorage.getItem('knowngood.token')") is None
