"""What the benchmark scripts print about the machine they ran on."""

from __future__ import annotations

import os
import platform
from pathlib import Path


def cpu_name() -> str:
    """The processor's model name (from /proc/cpuinfo where there is one)."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def load() -> str:
    """The 1, 5 and 15 minute load averages, as text."""
    try:
        return " ".join(f"{v:.2f}" for v in os.getloadavg())
    except OSError:
        return "unknown"
