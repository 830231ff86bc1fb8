"""`patchwood review` in a real browser (headless Chromium, tests/browser.py) against a real
server (waitress on a free port): the slider changes the counts, a detection is accepted, a label
deleted, a box drawn, and after a reload every edit is still there and on disk."""

from __future__ import annotations

import threading
import time

import cv2
import numpy as np
import pytest

import browser
from detector.io.labels import read_labels

pytestmark = pytest.mark.skipif(browser.missing() is not None, reason=str(browser.missing()))


def boxes_on_disk(path):
    return {it.image: np.asarray(it.boxes).tolist() for it in read_labels(path).items}


@pytest.fixture
def served(tmp_path):
    from detector.review import create_app, serve

    images = tmp_path / "images"
    images.mkdir()
    for name in ("a.png", "b.png"):
        cv2.imwrite(str(images / name), np.full((200, 300), 90, np.uint8))
    labels = tmp_path / "labels.csv"
    labels.write_text("image,x,y,width,height\na.png,20,20,60,60\na.png,200,120,50,50\nb.png,,,,\n")
    dets = tmp_path / "dets.csv"
    # a.png: 0.9 matches label 0, 0.6 is a false alarm at (120, 20); label 1 is missed
    dets.write_text("image,x,y,width,height,score\na.png,20,20,60,60,0.9\n"
                    "a.png,120,20,40,40,0.6\n")
    app = create_app(images, labels, dets, token="tok", host="127.0.0.1", port=0)
    bound = []
    thread = threading.Thread(target=serve, args=(app, "127.0.0.1", 0), kwargs={"ready": bound.append},
                              daemon=True)
    thread.start()
    for _ in range(100):
        if bound:
            break
        time.sleep(0.05)
    yield f"http://{bound[0]}/?token=tok", labels


def test_review_in_the_browser(served, tmp_path):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    url, labels = served
    driver = browser.start(tmp_path / "profile")
    try:
        driver.set_window_size(1300, 800)
        driver.get(url)
        wait = WebDriverWait(driver, 10)
        wait.until(lambda d: d.execute_script("return document.body.dataset.shown") == "a.png")
        text = lambda i: driver.find_element(By.ID, i).text  # noqa: E731
        # threshold 0.5: both detections kept: 1 matched, 1 false alarm, 1 missed label
        assert (text("img-matched"), text("img-alarms"), text("img-missed")) == ("1", "1", "1")
        # the slider to 0.7 (keyboard steps of 0.01 from 0.5): the false alarm (0.6) goes
        slider = driver.find_element(By.ID, "threshold")
        slider.send_keys(*[Keys.ARROW_RIGHT] * 20)
        assert text("threshold-value") == "0.70"
        assert (text("img-matched"), text("img-alarms"), text("img-missed")) == ("1", "0", "1")
        assert text("precision") == "1.000" and text("recall") == "0.500"   # 1 of 2 labels
        slider.send_keys(*[Keys.ARROW_LEFT] * 20)
        canvas = driver.find_element(By.ID, "canvas")

        def at(x, y):
            """Canvas offset of image point (x, y), from the page's own view transform."""
            sx, sy = driver.execute_script(
                "return [S.view.x + arguments[0] * S.view.scale, S.view.y + arguments[1] * S.view.scale]", x, y)
            w, h = canvas.size["width"], canvas.size["height"]
            return sx - w / 2, sy - h / 2

        def version():
            return int(driver.execute_script("return document.body.dataset.version"))

        # accept the false alarm: click inside it, press a
        ActionChains(driver).move_to_element_with_offset(canvas, *at(140, 40)).click().perform()
        ActionChains(driver).send_keys("a").perform()
        wait.until(lambda d: version() == 1)
        # delete the missed label (200, 120, 50, 50): click it, press Delete
        ActionChains(driver).move_to_element_with_offset(canvas, *at(225, 145)).click().perform()
        ActionChains(driver).send_keys(Keys.DELETE).perform()
        wait.until(lambda d: version() == 2)
        # draw a box from (30, 120) to (90, 180)
        ActionChains(driver).move_to_element_with_offset(canvas, *at(30, 120)).click_and_hold() \
            .move_to_element_with_offset(canvas, *at(60, 150)) \
            .move_to_element_with_offset(canvas, *at(90, 180)).release().perform()
        wait.until(lambda d: version() == 3)
        on_disk = boxes_on_disk(labels)["a.png"]
        assert on_disk[:2] == [[20, 20, 60, 60], [120, 20, 40, 40]]
        drawn = on_disk[2]
        assert len(on_disk) == 3 and drawn == pytest.approx([30, 120, 60, 60], abs=2)
        # reload: every edit is still there, and all detections now match a label
        driver.get(url)
        wait.until(lambda d: d.execute_script("return document.body.dataset.shown"))
        a = driver.execute_script("return S.images.find((im) => im.name === 'a.png')")
        assert len(a["labels"]) == 3 and [d["match"] for d in a["detections"]] == [0, 1]
        assert int(driver.execute_script("return document.body.dataset.version")) == 3
    finally:
        driver.quit()
