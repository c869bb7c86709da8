"""The operator page in headless Chromium (Debian's, driven by Selenium with an explicit chromedriver, so nothing is
downloaded) against the real server: sign in, upload, see the original beside the overlay with its colour scale,
enlarge it, review, watch the queue empty; a failed upload clears the old verdict; the recent list filters and pages
through the API's own query parameters; the drift state is at the top. With several part types the operator chooses
one, and the verdict, the lists, the filter, the model line and the drift banner all say which."""

from __future__ import annotations

import io
import os
import shutil
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from knowngood.training.heatmap import MAX_ALPHA, overlay_rgb
from PIL import Image
from service_testkit import ADMIN_AUTH, CHANGE, OUTPUT, STATION, STATION_AUTH, png_bytes

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
BADGE_COLOURS = {
    "ok": "rgba(46, 125, 50, 1)",
    "drifting": "rgba(198, 40, 40, 1)",
    "not_enough_images": "rgba(141, 110, 0, 1)",
}


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


def _sign_in(driver, url: str, operator: str = "Kim"):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    driver.get(url + "/")
    driver.find_element(By.ID, "token").send_keys(STATION)
    driver.find_element(By.ID, "operator").send_keys(operator)
    driver.find_element(By.ID, "sign-in").click()
    WebDriverWait(driver, 20).until(lambda d: d.find_element(By.ID, "app").is_displayed())


def _set_threshold(url: str, value: float) -> None:
    r = httpx.put(url + "/v1/model/threshold", json={"threshold": value, "operator": "test"}, headers=ADMIN_AUTH)
    assert r.status_code == 200, r.text


def _model_label(item: dict) -> tuple[str, str]:
    """(id, revision) of the model that made an inspection's verdict, as the API gives them."""
    model = item["model"] if isinstance(item.get("model"), dict) else {}
    model_id = model.get("id", item.get("model_id"))
    revision = model.get("revision", item.get("model_revision"))
    assert model_id and revision is not None, f"the API gives no model id and revision: {item}"
    return str(model_id), str(revision)


def _loaded(driver, element_id: str) -> int:
    """naturalWidth of a loaded <img>, 0 while it has none."""
    script = "const i = document.getElementById(arguments[0]); return i.complete && i.src ? i.naturalWidth : 0"
    return driver.execute_script(script, element_id)


def _png_array(data: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(data)).convert("RGB"), dtype=np.int16)


def test_the_legend_has_the_overlays_colours(client):
    # no token: the legend is part of the page, like /static
    r = client.get("/heatmap-legend.png")
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    legend = _png_array(r.content)[0]  # (256, 3), low anomaly on the left
    assert legend.shape == (256, 3)
    # the overlay of a mid-grey part at heat 0, vmax/2 and vmax (training/heatmap.py: the one colour rule)
    grey = np.full((1, 1, 3), 0.5, dtype=np.float32)
    for i, t in [(0, 0.0), (255, 1.0)]:
        expected = overlay_rgb(grey, np.full((1, 3), t, dtype=np.float32), 1.0)[0, 0]
        assert np.abs(legend[i] - expected).max() <= 1
    # independently of that function: no tint at the low end; yellow at MAX_ALPHA opacity at the high end
    assert np.abs(legend[0] - 128).max() <= 1
    top = 0.5 * (1 - MAX_ALPHA) + np.array([1.0, 1.0, 0.0]) * MAX_ALPHA
    assert np.abs(legend[-1] - (top * 255 + 0.5).astype(int)).max() <= 1
    # more heat: ever more red and ever less blue, through orange (red to yellow) in the middle
    assert np.all(np.diff(legend[:, 0]) >= 0) and np.all(np.diff(legend[:, 2]) <= 0)
    assert legend[128, 0] > legend[128, 1] > legend[128, 2]


def test_operator_signs_in_inspects_and_reviews(browser, live_server, tiny_good_images, tmp_path):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    # threshold 0 makes every part flagged, so the review queue has something in it
    _set_threshold(live_server.url, 0.0)
    image = tmp_path / "part.png"
    image.write_bytes(png_bytes(tiny_good_images[0]))
    wait = WebDriverWait(browser, 20)
    find = browser.find_element

    _sign_in(browser, live_server.url)
    assert "decision support" in find(By.ID, "caution").text
    assert "local codes" in find(By.ID, "caution").text and "quality standards" in find(By.ID, "caution").text
    assert browser.execute_script("return sessionStorage.getItem('knowngood.token')") == STATION
    assert browser.execute_script("return localStorage.length") == 0
    # one part type: nothing to choose, as before part types existed
    assert not find(By.ID, "part-type-field").is_displayed() and not find(By.ID, "f-part-type-field").is_displayed()
    assert find(By.ID, "model-info").text.startswith("model ")

    find(By.ID, "file").send_keys(str(image))
    find(By.ID, "part-id").send_keys("P-0001")
    find(By.ID, "station").send_keys("line-3")
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: find(By.ID, "verdict").text.lower() == "flag")
    assert float(find(By.ID, "score").text) > float(find(By.ID, "threshold").text) == 0.0
    wait.until(lambda d: find(By.ID, "queue-count").text == "1")
    # the original beside its overlay, both at the image's own 32 px, and the colour scale under them
    wait.until(lambda d: _loaded(d, "overlay") == 32 and _loaded(d, "original") == 32 and _loaded(d, "legend-ramp"))
    assert _loaded(browser, "legend-ramp") == 256
    original, overlay = find(By.ID, "original"), find(By.ID, "overlay")
    assert original.location["x"] < overlay.location["x"] and original.location["y"] == overlay.location["y"]
    assert "highest heat" in find(By.ID, "legend-high").text  # threshold 0: the map's own maximum is full tint
    drift = httpx.get(live_server.url + "/v1/drift", headers=STATION_AUTH).json()
    assert drift["status"] == "not_enough_images"  # one production image so far
    _drift_badge_shows(browser, drift)
    assert f"({drift['images']} of {drift['needed']})" in find(By.ID, "drift-text").text

    # the model that made the verdict, in the panel and in both lists, as the API stored it
    [stored] = httpx.get(live_server.url + "/v1/inspections?limit=5", headers=ADMIN_AUTH).json()["items"]
    model_id, revision = _model_label(stored)
    assert (find(By.ID, "result-model").text, find(By.ID, "result-revision").text) == (model_id, revision)
    assert find(By.ID, "result-part-type").text == stored["part_type"]
    wait.until(lambda d: f"{model_id} rev {revision}" in find(By.ID, "recent-rows").text)
    assert f"{model_id} rev {revision}" in find(By.ID, "queue-rows").text
    assert "P-0001" in find(By.ID, "queue-rows").text

    # the next part does not inherit the id or the file; the station stays and says so
    assert find(By.ID, "part-id").get_attribute("value") == ""
    assert browser.execute_script("return document.getElementById('file').files.length") == 0
    assert find(By.ID, "station").get_attribute("value") == "line-3"
    assert find(By.ID, "station-kept").is_displayed() and "kept" in find(By.ID, "station-kept").text

    # the original as the service gives it is the uploaded image; the overlay is tinted where the heat is
    auth = {"headers": STATION_AUTH}
    shown = _png_array(httpx.get(f"{live_server.url}/v1/inspections/{stored['id']}/image.png", **auth).content)
    tinted = _png_array(httpx.get(live_server.url + stored["heatmap_url"], **auth).content)
    uploaded = _png_array(png_bytes(tiny_good_images[0]))
    assert np.abs(shown - uploaded).max() <= 1 and np.abs(tinted - uploaded).max() > 20
    _screenshot(browser, tmp_path, "operator_page.png")

    # enlarge: a click opens the dialog with the larger picture; Escape closes it, and so does the close button
    overlay.click()
    wait.until(lambda d: d.execute_script("return document.getElementById('zoom').open"))
    assert find(By.ID, "zoom-image").get_attribute("src") == overlay.get_attribute("src")
    assert find(By.ID, "zoom-image").size["width"] > 2 * overlay.size["width"]
    _screenshot(browser, tmp_path, "operator_page_enlarged.png")
    find(By.ID, "zoom-original").click()
    assert find(By.ID, "zoom-image").get_attribute("src") == original.get_attribute("src")
    ActionChains(browser).send_keys(Keys.ESCAPE).perform()
    wait.until(lambda d: not d.execute_script("return document.getElementById('zoom').open"))
    original.click()
    wait.until(lambda d: find(By.ID, "zoom").is_displayed())
    find(By.ID, "zoom-close").click()
    wait.until(lambda d: not find(By.ID, "zoom").is_displayed())

    find(By.ID, "review-defective").click()
    wait.until(lambda d: find(By.ID, "queue-count").text == "0")
    assert "defective by Kim" in find(By.ID, "review-state").text
    assert find(By.ID, "queue-empty").is_displayed()
    wait.until(lambda d: "defective" in find(By.ID, "recent-rows").text)
    assert find(By.ID, "review-history").text == ""  # one review: the line above says it all

    # a second review overturns the first; both stay listed, oldest first, as GET .../reviews gives them
    find(By.ID, "review-good").click()
    wait.until(lambda d: "good by Kim" in find(By.ID, "review-state").text)
    history = wait.until(lambda d: find(By.ID, "review-history").find_elements(By.TAG_NAME, "li"))
    assert [li.text.split(" by ")[0] for li in history] == ["defective", "good"]
    shot = _screenshot(browser, tmp_path, "operator_page_reviewed.png")
    assert shot.stat().st_size > 10_000

    stored = httpx.get(live_server.url + "/v1/inspections?limit=5", headers=ADMIN_AUTH).json()["items"]
    assert [(i["part_id"], i["station"], i["review"]["label"], i["review"]["operator"]) for i in stored] == [
        ("P-0001", "line-3", "good", "Kim")
    ]


def test_a_failed_upload_clears_the_previous_verdict(browser, live_server, tiny_good_images, tmp_path):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    good, notes = tmp_path / "part.png", tmp_path / "notes.txt"
    good.write_bytes(png_bytes(tiny_good_images[1]))
    notes.write_text("not an image\n")
    wait = WebDriverWait(browser, 20)
    find = browser.find_element
    _sign_in(browser, live_server.url)

    find(By.ID, "file").send_keys(str(good))
    find(By.ID, "part-id").send_keys("P-0002")
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: find(By.ID, "verdict").text.lower() in ("pass", "flag"))
    assert find(By.ID, "result").is_displayed()

    find(By.ID, "file").send_keys(str(notes))
    find(By.ID, "part-id").send_keys("P-0003")
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: find(By.ID, "message").is_displayed())
    message = find(By.ID, "message").text
    assert "Not inspected" in message and "notes.txt" in message
    # nothing of the previous part stays beside the new file's name
    assert not find(By.ID, "result").is_displayed()
    for element_id in ("verdict", "score", "threshold", "result-id", "result-model", "result-revision"):
        assert browser.execute_script(f"return document.getElementById('{element_id}').textContent") == ""
    assert browser.execute_script("return document.getElementById('result-part-type').textContent") == ""
    assert not find(By.ID, "overlay").get_attribute("src") and not find(By.ID, "original").get_attribute("src")
    assert find(By.ID, "part-id").get_attribute("value") == "P-0003"  # kept for a retry with the right file
    _screenshot(browser, tmp_path, "operator_page_failed_upload.png")

    stored = httpx.get(live_server.url + "/v1/inspections?limit=5", headers=ADMIN_AUTH).json()["items"]
    assert [i["part_id"] for i in stored] == ["P-0002"]


def _post_batch(url: str, images: list[np.ndarray], *, station: str, prefix: str, **form) -> list[dict]:
    files = [("images", (f"{prefix}{i}.png", png_bytes(im), "image/png")) for i, im in enumerate(images)]
    data = {"station": station, "part_id": [f"{prefix}{i}" for i in range(len(images))], **form}
    r = httpx.post(url + "/v1/inspections/batch", files=files, data=data, headers=STATION_AUTH, timeout=60)
    assert r.status_code == 200, r.text
    return r.json()["items"]


def _rows(driver, table: str = "recent") -> list[dict[str, str]]:
    """A list's rows, each cell under its column's heading: time, part type, part, station, verdict, score, ..."""
    script = """const t = document.getElementById(arguments[0] + '-rows').closest('table');
        const heads = [...t.querySelectorAll('thead th')].map(h => h.textContent);
        return [...t.querySelectorAll('tbody tr')]
            .map(r => Object.fromEntries([...r.querySelectorAll('td')].map((c, i) => [heads[i], c.textContent])))"""
    return driver.execute_script(script, table)


def _local_time(driver, iso: str) -> str:
    """The value a datetime-local input shows for `iso` in the browser's time zone, floored to the second."""
    script = """const d = new Date(arguments[0]); const p = (n) => String(n).padStart(2, '0');
        return `${d.getFullYear()}-${p(d.getMonth() + 1)}-${p(d.getDate())}T${p(d.getHours())}:${p(d.getMinutes())}`
            + `:${p(d.getSeconds())}`"""
    return driver.execute_script(script, iso)


def test_the_recent_list_filters_and_pages(browser, live_server, tiny_good_images, tmp_path):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select, WebDriverWait

    # 12 parts pass at line-A, then (a second later, another threshold revision) 8 parts are flagged at line-B
    _set_threshold(live_server.url, 1e6)
    line_a = _post_batch(live_server.url, tiny_good_images[:12], station="line-A", prefix="A-")
    time.sleep(1.1)
    _set_threshold(live_server.url, 0.0)
    line_b = _post_batch(live_server.url, tiny_good_images[12:20], station="line-B", prefix="B-")
    assert {i["verdict"] for i in line_a} == {"pass"} and {i["verdict"] for i in line_b} == {"flag"}
    labels = {i["part_id"]: "{} rev {}".format(*_model_label(i)) for i in line_a + line_b}

    wait = WebDriverWait(browser, 20)
    find = browser.find_element
    _sign_in(browser, live_server.url)
    find(By.ID, "watch").click()  # no refresh between a filter's reply and the checks

    def shows(info: str):
        wait.until(lambda d: find(By.ID, "page-info").text == info)
        return _rows(browser)

    def apply(**fields):
        for element_id in ("f-station", "f-part", "f-since", "f-until"):
            browser.execute_script("document.getElementById(arguments[0]).value = arguments[1]", element_id, "")
        Select(find(By.ID, "f-verdict")).select_by_value("")
        for element_id, value in fields.items():
            if element_id == "f-verdict":
                Select(find(By.ID, element_id)).select_by_value(value)
            else:  # a datetime-local input takes its value in one format whatever the browser's locale
                browser.execute_script("document.getElementById(arguments[0]).value = arguments[1]", element_id, value)
        find(By.ID, "f-apply").click()

    Select(find(By.ID, "f-size")).select_by_visible_text("10")
    rows = shows("showing 1–10 of 20")
    assert [r["part"] for r in rows] == [f"B-{i}" for i in range(7, -1, -1)] + ["A-11", "A-10"]  # newest first
    assert all(r["model"] == labels[r["part"]] for r in rows)  # each verdict with the model revision that made it
    assert labels["A-0"] != labels["B-0"]  # the threshold change is a new revision
    find(By.ID, "page-next").click()
    rows = shows("showing 11–20 of 20")
    assert [r["part"] for r in rows] == [f"A-{i}" for i in range(9, -1, -1)]
    assert not find(By.ID, "page-next").is_enabled() and find(By.ID, "page-prev").is_enabled()
    _screenshot(browser, tmp_path, "operator_page_page2.png")
    find(By.ID, "page-prev").click()
    shows("showing 1–10 of 20")
    assert not find(By.ID, "page-prev").is_enabled()

    apply(**{"f-station": "line-B"})
    rows = shows("showing 1–8 of 8")
    assert {r["station"] for r in rows} == {"line-B"} and len(rows) == 8
    _screenshot(browser, tmp_path, "operator_page_filtered.png")
    apply(**{"f-verdict": "pass"})
    rows = shows("showing 1–10 of 12")
    assert {r["verdict"] for r in rows} == {"pass"}
    apply(**{"f-part": "A-3"})
    assert [(r["part"], r["station"]) for r in shows("showing 1–1 of 1")] == [("A-3", "line-A")]
    boundary = _local_time(browser, line_b[0]["time"])  # line-A ended more than a second before line-B began
    apply(**{"f-since": boundary})
    assert {r["station"] for r in shows("showing 1–8 of 8")} == {"line-B"}
    apply(**{"f-until": boundary})
    assert {r["station"] for r in shows("showing 1–10 of 12")} == {"line-A"}
    apply(**{"f-station": "line-C"})
    shows("showing 0 of 0")
    assert find(By.ID, "recent-empty").is_displayed() and _rows(browser) == []

    # 20 images are enough for the drift window: the badge at the top says what the API says, in its colour
    drift = httpx.get(live_server.url + "/v1/drift", headers=STATION_AUTH).json()
    assert drift["images"] >= drift["needed"] and drift["status"] != "not_enough_images", drift
    _drift_badge_shows(browser, drift)


def test_the_operator_chooses_among_several_part_types(browser, live_server, second_bundle, tiny_good_images, tmp_path):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select, WebDriverWait

    # the server's own bundle serves the part type "default"; a second bundle creates "bracket" beside it
    url = live_server.url
    files = {"bundle": ("second.kgm", second_bundle.read_bytes())}
    r = httpx.put(url + "/v1/part-types/bracket/model", files=files, data=CHANGE, headers=ADMIN_AUTH, timeout=120)
    assert r.status_code == 200, r.text
    bracket = r.json()
    served = httpx.get(url + "/v1/part-types", headers=STATION_AUTH).json()["items"]
    assert [p["name"] for p in served] == ["bracket", "default"] and served[1]["model"]["id"] != bracket["id"]
    # threshold 0: the default type's parts are flagged, so the review queue holds them
    change = {"threshold": 0.0, "operator": "test"}
    r = httpx.put(url + "/v1/part-types/default/threshold", json=change, headers=ADMIN_AUTH)
    assert r.status_code == 200, r.text
    _post_batch(url, tiny_good_images[:2], station="line-A", prefix="D-", part_type="default")
    image = tmp_path / "bracket.png"
    image.write_bytes(png_bytes(tiny_good_images[2]))

    wait = WebDriverWait(browser, 20)
    find = browser.find_element
    _sign_in(browser, url)
    find(By.ID, "watch").click()  # no refresh between a filter's reply and the checks
    choice = Select(find(By.ID, "part-type"))
    assert find(By.ID, "part-type-field").is_displayed()
    assert [o.get_attribute("value") for o in choice.options] == ["", "bracket", "default"]
    # the page picks no part type by itself when there are several: a part inspected as the wrong type is worse
    # than one not inspected yet
    assert choice.first_selected_option.get_attribute("value") == ""
    find(By.ID, "file").send_keys(str(image))
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: "Choose the part type" in find(By.ID, "message").text)

    # the model line follows the choice, from the part type's own route
    choice.select_by_value("bracket")
    line = f"part type bracket · model {bracket['id']} rev {bracket['revision']}"
    wait.until(lambda d: line in find(By.ID, "model-info").text)
    assert "threshold 2.500" in find(By.ID, "model-info").text

    find(By.ID, "part-id").send_keys("BR-1")
    find(By.ID, "inspect-btn").click()
    wait.until(lambda d: find(By.ID, "result-part-type").text == "bracket")
    assert find(By.ID, "result-model").text == bracket["id"]
    assert find(By.ID, "result-revision").text == bracket["revision"]
    # the choice stays for the next part, and says so
    assert choice.first_selected_option.get_attribute("value") == "bracket"
    assert find(By.ID, "part-type-kept").is_displayed()
    [stored] = httpx.get(url + "/v1/inspections?part_id=BR-1", headers=STATION_AUTH).json()["items"]
    assert stored["part_type"] == "bracket" and stored["model"]["id"] == bracket["id"]
    # the drift banner is the chosen part type's: its own window, which holds this one image so far
    r = httpx.get(url + "/v1/part-types/bracket/drift", headers=STATION_AUTH)
    assert r.status_code == 200, r.text
    assert r.json()["images"] == 1
    _drift_badge_shows(browser, r.json())
    wait.until(lambda d: "part type bracket" in find(By.ID, "drift-text").text)
    assert "(1 of " in find(By.ID, "drift-text").text

    def shows(info: str, part_type: str):
        Select(find(By.ID, "f-part-type")).select_by_value(part_type)
        find(By.ID, "f-apply").click()
        wait.until(lambda d: find(By.ID, "page-info").text == info)
        return _rows(browser)

    # the recent list names each row's part type; the filter narrows it to one, through the API's own parameter
    assert {(r["part"], r["part type"]) for r in shows("showing 1–3 of 3", "")} == {
        ("BR-1", "bracket"),
        ("D-0", "default"),
        ("D-1", "default"),
    }
    _screenshot(browser, tmp_path, "operator_page_part_types.png")
    assert [(r["part"], r["part type"]) for r in shows("showing 1–1 of 1", "bracket")] == [("BR-1", "bracket")]
    assert {r["part type"] for r in shows("showing 1–2 of 2", "default")} == {"default"}
    find(By.ID, "f-clear").click()
    wait.until(lambda d: find(By.ID, "page-info").text == "showing 1–3 of 3")
    assert find(By.ID, "f-part-type").get_attribute("value") == ""
    # flagged parts of every type wait in one queue, each with its type
    queue = {r["part"]: r["part type"] for r in _rows(browser, "queue")}
    assert {"D-0": "default", "D-1": "default"}.items() <= queue.items()
    assert queue.get("BR-1", "bracket") == "bracket"


def _drift_badge_shows(driver, drift: dict) -> None:
    """The badge at the top of the page shows the API's drift state in its colour, with a short text."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    badge = driver.find_element(By.ID, "drift-badge")
    WebDriverWait(driver, 20).until(lambda d: badge.text.lower() == "drift: " + drift["status"].replace("_", " "))
    if drift["status"] in BADGE_COLOURS:
        assert badge.value_of_css_property("background-color") == BADGE_COLOURS[drift["status"]]
    banner = driver.find_element(By.ID, "drift-banner")
    assert banner.is_displayed() and banner.location["y"] < driver.find_element(By.ID, "caution").location["y"]
    assert driver.find_element(By.ID, "drift-text").text


def test_a_bad_token_is_refused_on_the_page(browser, live_server):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    browser.get(live_server.url + "/")
    browser.find_element(By.ID, "token").send_keys("not-the-right-token")
    browser.find_element(By.ID, "sign-in").click()
    WebDriverWait(browser, 20).until(lambda d: d.find_element(By.ID, "message").is_displayed())
    assert "not recognised" in browser.find_element(By.ID, "message").text
    assert not browser.find_element(By.ID, "app").is_displayed()
    assert not browser.find_element(By.ID, "drift-banner").is_displayed()
    assert browser.execute_script("return sessionStorage.getItem('knowngood.token')") is None
