"""Prometheus duration strings (``30s``, ``5m``, ``1h30m``, ``7d``) to seconds and back.

Shared by the models (``--window 7d --step 30s``) and the controller (``rateWindow``,
``cooldown``, ``settle``). The syntax is Prometheus' own, from its querying basics page
(from memory, Prometheus 2.x "Time durations"): a number followed by one of
``ms, s, m, h, d, w, y``, several units concatenated from largest to smallest
(``1h30m``), each unit at most once; ``d`` is 24 h, ``w`` is 7 d, ``y`` is 365 d.
"""

from __future__ import annotations

import math
import re

from ratefit.models.errors import InputError

__all__ = ["parse_duration", "format_duration", "UNIT_SECONDS"]

UNIT_SECONDS: dict[str, float] = {
    "y": 365 * 86400.0,
    "w": 7 * 86400.0,
    "d": 86400.0,
    "h": 3600.0,
    "m": 60.0,
    "s": 1.0,
    "ms": 0.001,
}
_ORDER = ["y", "w", "d", "h", "m", "s", "ms"]
_PART = re.compile(r"(\d+)(ms|[ywdhms])")


def parse_duration(text: str, *, field: str = "duration") -> float:
    """Seconds in a Prometheus duration such as ``7d``, ``30s`` or ``1h30m``.

    Raises :class:`InputError` naming ``field`` when the text is not a duration,
    when units are out of order or repeated, or when the duration is zero.
    """
    if not isinstance(text, str):
        raise InputError(f"{field}: expected a duration string like '5m' or '1h30m', got {text!r}")
    s = text.strip()
    if not s:
        raise InputError(f"{field}: empty duration; write e.g. '30s', '5m', '1h30m' or '7d'")
    pos = 0
    total = 0.0
    last_rank = -1
    for m in _PART.finditer(s):
        if m.start() != pos:
            break
        unit = m.group(2)
        rank = _ORDER.index(unit)
        if rank <= last_rank:
            raise InputError(
                f"{field}: {text!r} repeats a unit or lists units out of order "
                "(write the largest unit first, each once: '1h30m')"
            )
        last_rank = rank
        total += int(m.group(1)) * UNIT_SECONDS[unit]
        pos = m.end()
    if pos != len(s) or pos == 0:
        raise InputError(
            f"{field}: {text!r} is not a Prometheus duration; write a number and a unit "
            "(ms, s, m, h, d, w, y), e.g. '30s', '5m', '1h30m' or '7d'"
        )
    if total <= 0:
        raise InputError(f"{field}: {text!r} is zero; a duration must be positive")
    return total


def format_duration(seconds: float) -> str:
    """The shortest Prometheus duration for ``seconds`` (rounded to whole ms): 5400 → ``1h30m``."""
    if not math.isfinite(seconds) or seconds <= 0:
        raise InputError(f"duration must be a positive finite number of seconds, got {seconds!r}")
    ms = int(round(seconds * 1000))
    out = []
    for unit in _ORDER:
        size = int(UNIT_SECONDS[unit] * 1000)
        n, ms = divmod(ms, size)
        if n:
            out.append(f"{n}{unit}")
    return "".join(out) or "1ms"
