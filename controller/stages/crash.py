"""The crash-test hook: ``RATEFIT_CRASH_AT=<point>:<n>`` kills the process with SIGKILL
the n-th time a pass reaches ``point`` (``after-dry-run``, ``after-patch`` — act stage;
``after-status`` — orchestrator, per workload). A TEST HOOK for
``tests/test_faults_crash.py``; never set it in production."""

from __future__ import annotations

import os
import signal
import sys
from collections.abc import Callable

from ratefit.models.errors import RatefitError

__all__ = ["CRASH_POINTS", "crash_hook_from_env"]

CRASH_POINTS = ("after-dry-run", "after-patch", "after-status")


def crash_hook_from_env(value: str | None) -> Callable[[str], None] | None:
    """``RATEFIT_CRASH_AT=after-dry-run:1`` → a hook that SIGKILLs this process the
    first time the pass reaches ``after-dry-run``."""
    if not value:
        return None
    point, _, nth = value.partition(":")
    if point not in CRASH_POINTS:
        raise RatefitError(f"RATEFIT_CRASH_AT={value!r}: point must be one of {', '.join(CRASH_POINTS)}")
    n = int(nth or "1")
    seen = {"n": 0}

    def hook(at: str) -> None:
        if at != point:
            return
        seen["n"] += 1
        if seen["n"] >= n:
            print(f"ratefit: RATEFIT_CRASH_AT={value}: killing myself at {at}", file=sys.stderr, flush=True)
            os.kill(os.getpid(), signal.SIGKILL)

    return hook
