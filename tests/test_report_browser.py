"""The score report in a real browser (headless Chromium, tests/browser.py), opened from file://:
the per-image table sorts by any column on a click, ascending then descending, numbers as numbers
(the order is held to Python's sort of the same rows); the threshold slider, moved with the
keyboard, recounts to hand-worked values, the table follows it, and the "open in review" links
take the address typed into the page (kept in the browser, never in the report folder)."""

from __future__ import annotations

import pytest

import browser
from test_score_cli import make_folder

pytestmark = pytest.mark.skipif(browser.missing() is not None, reason=str(browser.missing()))


def test_per_image_table_sorts_by_a_click(tmp_path):
    from selenium.webdriver.common.by import By

    from detector.reporting.score_report import score_files

    root = make_folder(tmp_path / "s")
    score_files(root / "detections.csv", root / "labels.csv", tmp_path / "r",
                images_dir=root / "images")
    driver = browser.start(tmp_path / "profile")
    try:
        driver.get((tmp_path / "r" / "report.html").as_uri())
        table = driver.find_element(By.ID, "per-image")
        heads = table.find_elements(By.CSS_SELECTOR, "thead th")
        names = [h.text for h in heads]
        assert names == ["image", "objects", "detections", "true", "false alarms", "misses",
                         "review"]
        assert heads[6].get_attribute("aria-sort") is None   # the links' column does not sort

        def rows():
            return [[td.text for td in tr.find_elements(By.TAG_NAME, "td")]
                    for tr in table.find_elements(By.CSS_SELECTOR, "tbody tr")]

        start = rows()
        assert len(start) == 4
        for column in (1, 2, 4, 0):
            heads[column].click()
            numeric = column > 0
            key = (lambda r: float(r[column])) if numeric else (lambda r: r[column])
            assert rows() == sorted(start, key=key)                       # ascending
            assert heads[column].get_attribute("aria-sort") == "ascending"
            heads[column].click()
            assert rows() == sorted(start, key=key, reverse=True)         # then descending
            assert heads[column].get_attribute("aria-sort") == "descending"
    finally:
        driver.quit()


# e.png of tests/test_score_cli.py renamed: a space, a folder and a "#" to be encoded in the link
SLIDER_LABELS = """image,x,y,width,height
a.png,4,4,16,16
a.png,36,20,16,16
b.png,10,10,20,20
c.png,,,,
belt 1/frame#2.png,20,10,16,16
"""
SLIDER_DETECTIONS = """image,x,y,width,height,score
a.png,4,4,16,16,0.9
a.png,30,2,10,10,0.7
a.png,36,21,16,16,0.6
b.png,40,30,12,12,0.8
c.png,0,0,8,8,0.5
"""
BELT = "belt 1/frame#2.png"


def test_threshold_slider_and_review_links(tmp_path):
    """Hand-worked counts (IoU 0.5): a.png's 0.9 and 0.6 find its two objects (0.6 at IoU
    16*15/(256+256-240) = 0.882), 0.7 there, 0.8 on b.png and 0.5 on c.png are false alarms;
    4 objects. Best F1 is at 0.6 (tests/test_report.py works it out), where the slider starts."""
    from selenium.common.exceptions import TimeoutException
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import WebDriverWait

    from detector.reporting.score_report import score_files

    (tmp_path / "labels.csv").write_text(SLIDER_LABELS, encoding="utf-8")
    (tmp_path / "detections.csv").write_text(SLIDER_DETECTIONS, encoding="utf-8")
    score_files(tmp_path / "detections.csv", tmp_path / "labels.csv", tmp_path / "r")
    driver = browser.start(tmp_path / "profile")
    try:
        driver.get((tmp_path / "r" / "report.html").as_uri())
        text = lambda i: driver.find_element(By.ID, i).text  # noqa: E731
        table = driver.find_element(By.ID, "per-image")

        def counts():
            return tuple(text("at-" + k) for k in ("detections", "true-detections",
                                                   "false-alarms", "misses", "precision",
                                                   "recall"))

        def rows():
            """image -> (detections, true, false alarms, misses), in the table's order."""
            return [(tds[0].text, tuple(int(td.text) for td in tds[2:6]))
                    for tds in (tr.find_elements(By.TAG_NAME, "td")
                                for tr in table.find_elements(By.CSS_SELECTOR, "tbody tr"))]

        def settled(check):
            """The table catches up with the slider once per animation frame: wait for it."""
            try:
                WebDriverWait(driver, 5).until(lambda _: check(rows()))
            except TimeoutException:
                pytest.fail(f"the per-image table did not reach the expected rows: {rows()}")

        def point():
            dot = driver.find_element(By.ID, "threshold-point")
            return (dot.get_attribute("data-recall"), dot.get_attribute("data-precision"),
                    dot.get_attribute("visibility"))

        # at 0.6: 0.9 T, 0.8 F, 0.7 F, 0.6 T kept: 2 true, 2 false alarms, 4 - 2 missed
        assert text("threshold-value") == "0.6 (recommended)"
        assert counts() == ("4", "2", "2", "2", "0.500", "0.500")
        assert point() == ("0.5", "0.5", "visible")
        # most errors first: b.png (1 + 1), then a.png and the belt frame (1 each; a.png has no
        # miss, the belt frame one), c.png clean (its 0.5 is below the threshold)
        assert rows() == [("b.png", (1, 0, 1, 1)), (BELT, (0, 0, 0, 1)), ("a.png", (3, 2, 1, 0)),
                          ("c.png", (0, 0, 0, 0))]    # at once: written by the server
        slider = driver.find_element(By.ID, "threshold")
        slider.send_keys(*[Keys.ARROW_RIGHT] * 11)
        # 0.71 keeps 0.9 (T) and 0.8 (F): 1 true, 1 false alarm, 3 missed; P 1/2, R 1/4
        assert text("threshold-value") == "0.71"
        assert counts() == ("2", "1", "1", "3", "0.500", "0.250")
        assert point() == ("0.25", "0.5", "visible")
        # b.png 2 errors; a.png and the belt frame 1 each (a miss each): by name; c.png clean
        settled(lambda r: r == [("b.png", (1, 0, 1, 1)), ("a.png", (1, 1, 0, 1)),
                                (BELT, (0, 0, 0, 1)), ("c.png", (0, 0, 0, 0))])
        slider.send_keys(*[Keys.ARROW_RIGHT] * 10)
        # 0.81 keeps 0.9 alone: P 1/1, R 1/4
        assert text("threshold-value") == "0.81"
        assert counts() == ("1", "1", "0", "3", "1.000", "0.250")
        slider.send_keys(*[Keys.ARROW_LEFT] * 31)
        # 0.50 keeps all five: 2 true, 3 false alarms; P 2/5, R 2/4; c.png's 0.5 now counts
        assert text("threshold-value") == "0.50"
        assert counts() == ("5", "2", "3", "2", "0.400", "0.500")
        assert point() == ("0.5", "0.4", "visible")
        settled(lambda r: dict(r)["c.png"] == (1, 0, 1, 0))
        # sorted by a column, the table stays sorted by it as the slider moves
        heads = table.find_elements(By.CSS_SELECTOR, "thead th")
        heads[4].click()                                    # false alarms, ascending
        slider.send_keys(Keys.END)
        # 1.00 keeps nothing: precision undefined, every object missed, no dot
        assert text("threshold-value") == "1.00"
        assert counts() == ("0", "0", "0", "4", "n/a", "0.000")
        assert point()[2] == "hidden"
        settled(lambda r: [row[1][2] for row in r] == [0, 0, 0, 0])
        assert heads[4].get_attribute("aria-sort") == "ascending"
        slider.send_keys(*[Keys.ARROW_LEFT] * 30)           # 0.70: 0.9 T, 0.8 F, 0.7 F
        assert counts() == ("3", "1", "2", "3", "0.333", "0.250")
        # a.png and b.png one false alarm each now, still sorted by false alarms, ascending
        settled(lambda r: [row[1][2] for row in r] == [0, 0, 1, 1])
        driver.find_element(By.ID, "sort-errors").click()   # back to most errors first
        assert [r[0] for r in rows()] == ["a.png", "b.png", BELT, "c.png"]  # 2, 2, 1, 0 errors
        driver.find_element(By.ID, "to-recommended").click()
        assert text("threshold-value") == "0.6 (recommended)"
        assert counts() == ("4", "2", "2", "2", "0.500", "0.500")

        # the review links: inactive until an address is given
        def links():
            return {a.get_attribute("data-image"): (a.get_attribute("href"),
                                                    a.get_attribute("aria-disabled"))
                    for a in table.find_elements(By.CSS_SELECTOR, "a.review-link")}

        assert set(links().values()) == {(None, "true")}
        assert "inactive" in text("review-state")
        field = driver.find_element(By.ID, "review-address")
        field.send_keys("127.0.0.1 port 8123")              # not an address: still inactive
        assert set(links().values()) == {(None, "true")}
        assert text("review-state").startswith("not an address")
        field.clear()
        address = "http://127.0.0.1:8123/?token=abc123"
        field.send_keys(address + "#image=old.png")         # an old fragment is dropped
        assert links() == {
            "a.png": (address + "#image=a.png", None),
            "b.png": (address + "#image=b.png", None),
            "c.png": (address + "#image=c.png", None),
            # encodeURIComponent: space %20, "/" %2F, "#" %23
            BELT: (address + "#image=belt%201%2Fframe%232.png", None)}
        # kept in the browser across a reload; never in the report folder
        driver.refresh()
        table = driver.find_element(By.ID, "per-image")
        assert driver.find_element(By.ID, "review-address").get_attribute("value") \
            == address + "#image=old.png"
        assert links()["a.png"] == (address + "#image=a.png", None)
        for path in (tmp_path / "r").rglob("*"):
            assert not path.is_file() or b"abc123" not in path.read_bytes(), path
        # emptied, it is forgotten: inactive again, after a reload too
        field = driver.find_element(By.ID, "review-address")
        field.send_keys(Keys.CONTROL, "a")
        field.send_keys(Keys.BACK_SPACE)
        assert set(links().values()) == {(None, "true")}
        driver.refresh()
        table = driver.find_element(By.ID, "per-image")
        assert driver.find_element(By.ID, "review-address").get_attribute("value") == ""
        assert set(links().values()) == {(None, "true")}
    finally:
        driver.quit()
