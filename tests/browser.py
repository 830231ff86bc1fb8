"""A real browser for the tests of pages: Debian's Chromium (``/usr/bin/chromium``) driven by
Selenium through Debian's ChromeDriver (``/usr/bin/chromedriver``, given explicitly, so that
nothing is ever downloaded). ``.ci/run`` installs both; without them the browser tests are
skipped and ``make test`` says so in one line (tests/conftest.py)."""

from __future__ import annotations

import os
import shutil

CHROMIUM = os.environ.get("PATCHWOOD_CHROMIUM", "/usr/bin/chromium")
CHROMEDRIVER = os.environ.get("PATCHWOOD_CHROMEDRIVER", "/usr/bin/chromedriver")


def missing() -> str | None:
    """Why the browser tests cannot run here, or None."""
    for path in (CHROMIUM, CHROMEDRIVER):
        if not (os.path.isfile(path) and os.access(path, os.X_OK)) and not shutil.which(path):
            return f"no {path} (Debian's chromium and chromium-driver; .ci/run installs them)"
    return None


def start(profile_dir):
    """A headless Chromium with a fresh profile and no background networking (this machine's
    network is closed; without these flags Chromium keeps trying to reach its services)."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--disable-dev-shm-usage",
                 f"--user-data-dir={profile_dir}"):
        options.add_argument(flag)
    return webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=options)
