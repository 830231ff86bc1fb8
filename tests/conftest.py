"""Session-wide test settings: one line saying whether the browser tests ran."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import browser  # noqa: E402


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    why = browser.missing()
    terminalreporter.write_line("browser tests: " + ("ran in headless Chromium" if why is None
                                                     else f"SKIPPED, {why}"))
