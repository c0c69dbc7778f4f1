"""`trawl check` in a real browser: Debian's headless Chromium driven by Selenium (W3C WebDriver).

The page is served by the real command (`trawl check --no-browser`) in a subprocess; the
browser loads it, plays a clip, marks hits with the keyboard, reloads, and the CSV is then
read back by the checked-sample reader that `trawl calibrate` and `trawl adapt` use.
"""

import re
import shutil
import signal

import pytest

pytestmark = pytest.mark.browser
webdriver = pytest.importorskip("selenium.webdriver", reason="the browser tests need selenium (pip install -e '.[test]')")
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.common.keys import Keys  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402

from conftest import start_check  # noqa: E402
from detector.checked import read_checked  # noqa: E402

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
DRIVER = shutil.which("chromedriver")


@pytest.fixture
def browser():
    if not (CHROMIUM and DRIVER):
        pytest.skip("Chromium and its driver are not installed (apt-get install chromium chromium-driver; .ci/run does)")
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for arg in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--window-size=1280,860",
                "--autoplay-policy=no-user-gesture-required", "--mute-audio"):
        opts.add_argument(arg)
    driver = webdriver.Chrome(options=opts, service=Service(DRIVER))
    driver.set_page_load_timeout(30)
    yield driver
    driver.quit()


@pytest.fixture
def served(check_archive, tmp_path):
    """`trawl check SAMPLE --index IDX --no-browser` running; its address and the sample's path."""
    proc, url, mine = start_check(check_archive, tmp_path)
    assert re.fullmatch(r"http://127\.0\.0\.1:\d+/\S+/", url), url
    yield url, mine
    proc.send_signal(signal.SIGINT)
    proc.communicate(timeout=20)


def wait(driver, condition, seconds=20):
    return WebDriverWait(driver, seconds, poll_frequency=0.1).until(lambda d: condition(d))


def progress(driver):
    return driver.find_element(By.ID, "progress").text


def press(driver, key):
    driver.find_element(By.TAG_NAME, "body").send_keys(key)


def open_page(driver, url):
    for _ in range(50):  # the address is printed a moment before the server accepts
        driver.get(url)
        if driver.find_elements(By.ID, "progress"):
            break
    wait(driver, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-loaded") is not None)


def test_play_mark_three_by_keyboard_reload_and_read_back(browser, served):
    url, sample = served
    open_page(browser, url)
    assert progress(browser) == "checked 0 of 5 · yes 0 · no 0"
    assert browser.find_element(By.ID, "term").text == "kalimboro"
    # the page shows the keys it answers to
    keys = browser.find_element(By.ID, "buttons").text
    for label in ("Y", "yes", "N", "no", "S", "skip", "R", "replay", "replay slower", "previous", "next"):
        assert label in keys

    # play the clip: R replays; the audio element must actually advance through it
    press(browser, "r")
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-played") == "yes")
    wait(browser, lambda d: d.execute_script("return document.getElementById('player').currentTime") > 0.2)
    duration = browser.execute_script("return document.getElementById('player').duration")
    assert duration == pytest.approx(3.5, abs=0.01)  # hand-worked: 2.0-2.5 s with 1.5 s either side
    rate = browser.execute_script("return document.getElementById('player').playbackRate")
    assert rate == 1
    press(browser, Keys.SHIFT + "r")  # replay slower
    wait(browser, lambda d: d.execute_script("return document.getElementById('player').playbackRate") < 1)

    # three verdicts with the keyboard: Y, N, Y; each moves on to the next unchecked hit
    press(browser, "y")
    wait(browser, lambda d: progress(d) == "checked 1 of 5 · yes 1 · no 0")
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-current") == "1")
    press(browser, "n")
    wait(browser, lambda d: progress(d) == "checked 2 of 5 · yes 1 · no 1")
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-current") == "2")
    press(browser, "y")
    wait(browser, lambda d: progress(d) == "checked 3 of 5 · yes 2 · no 1")

    # reload: the marks are still there, and the page continues at the first unchecked hit
    browser.refresh()
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-loaded") is not None)
    assert progress(browser) == "checked 3 of 5 · yes 2 · no 1"
    items = browser.find_elements(By.CSS_SELECTOR, "#list li")
    assert [li.get_attribute("class").split()[0] for li in items] == ["v-yes", "v-no", "v-yes", "v-none", "v-none"]
    assert browser.find_element(By.TAG_NAME, "body").get_attribute("data-current") == "3"
    assert browser.find_element(By.ID, "term").text == "=tofeku"

    # the file is a checked sample for trawl calibrate / trawl adapt, every row in its place
    rows = read_checked(sample)
    assert [r.verdict for r in rows] == [True, False, True, None, None]
    assert [r.term for r in rows] == ["kalimboro", "kalimboro", "sanu peta", "=tofeku", "sanu peta"]


def test_filter_by_term_jump_and_note(browser, served):
    url, sample = served
    open_page(browser, url)
    from selenium.webdriver.support.ui import Select

    Select(browser.find_element(By.ID, "filter")).select_by_visible_text("sanu peta")
    items = browser.find_elements(By.CSS_SELECTOR, "#list li")
    assert [li.get_attribute("data-n") for li in items] == ["2", "4"]
    items[1].click()  # jump to the second "sanu peta" hit
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-current") == "4")
    note = browser.find_element(By.ID, "note")
    note.send_keys("a caller, music under it", Keys.ENTER)
    wait(browser, lambda d: "note saved" in d.find_element(By.ID, "status").text)
    press(browser, Keys.ARROW_LEFT)  # previous, within the filter
    wait(browser, lambda d: d.find_element(By.TAG_NAME, "body").get_attribute("data-current") == "2")
    press(browser, "n")
    wait(browser, lambda d: progress(d) == "checked 1 of 5 · yes 0 · no 1")
    import csv
    import io

    table = list(csv.DictReader(io.StringIO(sample.read_text(encoding="utf-8"), newline="")))
    assert table[4]["note"] == "a caller, music under it" and table[4]["verdict"] == ""
    assert table[2]["verdict"] == "no"
