"""What every benchmark prints first: the machine its figures come from."""

from __future__ import annotations

import os
import platform
from pathlib import Path

import numpy as np


def where_run() -> str:
    cpu = platform.machine()
    cpuinfo = Path("/proc/cpuinfo")
    if cpuinfo.exists():
        names = [ln.split(":", 1)[1].strip() for ln in cpuinfo.read_text().splitlines() if ln.startswith("model name")]
        cpu = names[0] if names else cpu
    return (
        f"{cpu} ({os.cpu_count()} logical cores), {platform.system()}, "
        f"Python {platform.python_version()}, numpy {np.__version__}"
    )
