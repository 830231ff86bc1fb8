"""The score report in a real browser (headless Chromium, tests/browser.py): the per-image table
sorts by any column on a click, ascending then descending, numbers as numbers; the order is held
to Python's sort of the same rows."""

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
        assert names == ["image", "objects", "detections", "true", "false alarms", "misses"]

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
