"""What the benchmarks print about the machine they ran on (figures mean little without it)."""

from __future__ import annotations

import platform


def cpu_model() -> str:
    """The CPU's model name from /proc/cpuinfo (Linux), else what platform knows."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"
