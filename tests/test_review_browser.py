"""`patchwood review` in a real browser (headless Chromium, tests/browser.py) against a real
server (waitress on a free port): the slider changes the counts, a detection is accepted, a label
deleted, a box drawn, and after a reload every edit is still there and on disk; a second run is
compared, the audit's flags filter the list, an image is opened from the address, and a real
retraining job (harvest, train, scan) runs from the page and opens as the comparison.

With ``PATCHWOOD_SCREENSHOTS=DIR`` set, the tests also save the README's screenshots there
(``make screenshots``)."""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

import cv2
import numpy as np
import pytest

import browser
from detector.evaluation.matching import match_image
from detector.io.labels import read_detections, read_labels

pytestmark = pytest.mark.skipif(browser.missing() is not None, reason=str(browser.missing()))


def boxes_on_disk(path):
    return {it.image: np.asarray(it.boxes).tolist() for it in read_labels(path).items}


def start_server(app):
    from detector.review import serve

    bound = []
    thread = threading.Thread(target=serve, args=(app, "127.0.0.1", 0), kwargs={"ready": bound.append},
                              daemon=True)
    thread.start()
    for _ in range(100):
        if bound:
            break
        time.sleep(0.05)
    return bound[0]


def screenshot(driver, name):
    """Save the README's screenshot ``name`` when PATCHWOOD_SCREENSHOTS names a folder."""
    folder = os.environ.get("PATCHWOOD_SCREENSHOTS")
    if folder:
        Path(folder).mkdir(parents=True, exist_ok=True)
        driver.save_screenshot(str(Path(folder) / name))


@pytest.fixture
def served(tmp_path):
    from detector.review import create_app

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
    yield f"http://{start_server(app)}/?token=tok", labels


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
        assert len(a["labels"]) == 3 and [d["match"] for d in a["runs"][0]] == [0, 1]
        assert int(driver.execute_script("return document.body.dataset.version")) == 3
    finally:
        driver.quit()


def test_compare_audit_and_retrain_in_the_browser(tmp_path):
    """The demo scenario's training frames under review with a made-up first run (each label
    found, plus one false alarm in frame 1), an audit flag on frame 2, and a real retraining job
    from the page whose scan becomes the second run."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select, WebDriverWait

    from detector.reporting.audit_files import CSV_NAME
    from detector.review import create_app
    from synthetic_images import render_scenario

    render_scenario(tmp_path / "sc", train_images=8, test_images=1, seed=3)
    images, labels = tmp_path / "sc" / "train" / "images", tmp_path / "sc" / "train" / "labels.csv"
    items = read_labels(labels).items
    boxed = [it for it in items if len(it.boxes)]
    first, second = boxed[0], boxed[1]
    rows = [f"{it.image},{','.join(f'{v:g}' for v in b)},0.9" for it in items for b in it.boxes]
    rows.append(f"{first.image},1,1,20,20,0.8")  # the false alarm: a corner of frame 1
    dets = tmp_path / "first.csv"
    dets.write_text("image,x,y,width,height,score\n" + "\n".join(rows) + "\n")
    audit = tmp_path / "audit"
    audit.mkdir()
    b = second.boxes[0]
    (audit / CSV_NAME).write_text("image,x,y,width,height,kind,score\n"
                                  f"{second.image},{b[0]:g},{b[1]:g},{b[2]:g},{b[3]:g},"
                                  "object-called-background,0.1000\n")
    app = create_app(images, labels, dets, audit=audit, runs_dir=tmp_path / "runs", token="tok",
                     host="127.0.0.1", port=0)
    url = f"http://{start_server(app)}/?token=tok"
    driver = browser.start(tmp_path / "profile")
    try:
        driver.set_window_size(1300, 800)
        # the address names an image: that one opens first
        driver.get(url + "#image=" + second.image)
        wait = WebDriverWait(driver, 10)
        wait.until(lambda d: d.execute_script("return document.body.dataset.ready") == "1")
        wait.until(lambda d: d.execute_script("return document.body.dataset.shown") == second.image)
        text = lambda i: driver.find_element(By.ID, i).text  # noqa: E731
        # the audit filter lists frame 2 alone
        Select(driver.find_element(By.ID, "filter")).select_by_value("flagged")
        listed = driver.execute_script(
            "return [...document.querySelectorAll('#images li')].map((li) => li.dataset.name)")
        assert listed == [second.image]
        Select(driver.find_element(By.ID, "filter")).select_by_value("all")
        # one run so far: every label found, one false alarm among them
        n = sum(len(it.boxes) for it in items)
        assert text("precision") == f"{n / (n + 1):.3f}" and text("recall") == "1.000"
        assert not driver.find_element(By.ID, "run-choice").is_displayed()
        # retrain from the page: the real harvest, train and scan, into runs/retrain-1
        driver.find_element(By.CSS_SELECTOR, "#retrain summary").click()
        commands = text("retrain-commands").splitlines()
        assert [c.split()[:2] for c in commands] == [["patchwood", "harvest"],
                                                      ["patchwood", "train"],
                                                      ["patchwood", "scan"]]
        driver.find_element(By.ID, "retrain-run").click()
        WebDriverWait(driver, 300).until(
            lambda d: d.execute_script("return document.body.dataset.job") in ("done", "failed"))
        assert driver.execute_script("return document.body.dataset.job") == "done", text("job-state")
        new = tmp_path / "runs" / "retrain-1" / "detections.csv"
        assert new.is_file() and (tmp_path / "runs" / "retrain-1" / "model.npz").is_file()
        driver.find_element(By.ID, "retrain-open").click()
        wait.until(lambda d: d.execute_script("return document.body.dataset.runs") == "2")
        # the new run is shown; its precision and recall are its own, from the file on disk
        assert driver.execute_script("return document.body.dataset.run") == "1"
        assert text("run-1").startswith("retrain-1/detections.csv: precision")
        ActionChains(driver).send_keys("c").perform()
        assert driver.execute_script("return document.body.dataset.run") == "0"
        assert text("precision") == f"{n / (n + 1):.3f}"
        # "runs disagree" lists the images where, at 0.5, the runs find other labels or another
        # number of false alarms, judged here from the two files with the project's matching
        Select(driver.find_element(By.ID, "filter")).select_by_value("disagree")
        listed = driver.execute_script(
            "return [...document.querySelectorAll('#images li')].map((li) => li.dataset.name)")
        runs = [{d.image: d for d in read_detections(path)} for path in (dets, new)]

        def judged(run, it):
            d = run.get(it.image)
            keep = [] if d is None else [k for k, s in enumerate(d.scores) if s >= 0.5]
            if not keep:
                return 0, sorted(range(len(it.boxes)))
            matched = match_image(np.asarray(d.boxes, float)[keep], np.asarray(d.scores)[keep],
                                  np.asarray(it.boxes, float).reshape(-1, 4))[0]
            found = set(int(m) for m in matched if m >= 0)
            return int(sum(matched < 0)), sorted(set(range(len(it.boxes))) - found)

        expected = [it.image for it in items if judged(runs[0], it) != judged(runs[1], it)]
        assert sorted(listed) == sorted(expected)
        if listed:
            driver.find_element(By.CSS_SELECTOR, "#images li").click()
            wait.until(lambda d: d.execute_script("return document.body.dataset.shown") == listed[0])
        driver.find_element(By.CSS_SELECTOR, "#retrain summary").click()  # folded again
        driver.execute_script("document.querySelector('aside').scrollTop = 0")
        screenshot(driver, "review-compare.png")
    finally:
        driver.quit()
