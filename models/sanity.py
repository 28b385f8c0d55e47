"""Physical bounds on the numbers ratefit learns from and serves, and their checks.

A content hash proves that a stored file is the one that was written, not that its
numbers make sense. These checks do: every value a demand curve holds, and every
sample it is learned from, must be a finite number inside a stated bound. One place
holds the bounds, so the trainer (refusing a sample), the store (refusing an
artifact at load) and the sizing API (refusing a rate) agree.

The bounds are generous on purpose — they stop absurd values (1e17 cores, a band of
1e308, a rate of 1e12 req/s), not unusual ones:

- ``MAX_CORES`` = 1,024 cores for one container. The largest machines sold have a few
  hundred cores (common practice, no source); a container's CPU request is bounded
  by its node's allocatable CPU (Kubernetes docs, "Resource Management for Pods and
  Containers"), so a demand above 1,024 cores cannot be scheduled anywhere.
- ``MAX_RATE`` = 1e9 req/s per pod: far beyond any real server (common practice, no
  source); it also keeps every answer well inside int64 millicores.

Every check raises ``ValueError`` with a message that names the field and the bound,
never the whole offending document; callers add the file and line.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

__all__ = ["MAX_CORES", "MAX_RATE", "check_sample", "check_curve", "BoundError"]

#: the largest CPU demand (cores) one container can be said to need
MAX_CORES = 1024.0
#: the largest request rate (req/s per pod) ratefit learns from or answers for
MAX_RATE = 1e9


class BoundError(ValueError):
    """A value outside its physical bound (or not a finite number)."""


def _bounded(value: object, what: str, *, hi: float, unit: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise BoundError(f"{what}: must be a number")
    v = float(value)
    if not math.isfinite(v):
        raise BoundError(f"{what}: must be a finite number")
    if v < 0:
        raise BoundError(f"{what}: must be >= 0 {unit}")
    if v > hi:
        raise BoundError(f"{what}: {v:.6g} is above the bound of {hi:g} {unit}")
    return v


def check_sample(rate: float, cpu: float) -> None:
    """One training sample: rate (req/s per pod) and CPU (cores) inside their bounds.
    NaN is a missing value in ``models.samples`` (counted and dropped there) and passes;
    anything else must be finite, >= 0 and within the bound. ``models.samples`` calls
    this per CSV row and adds the file:line."""
    if not (isinstance(rate, float) and math.isnan(rate)):
        _bounded(rate, "rate", hi=MAX_RATE, unit="req/s")
    if not (isinstance(cpu, float) and math.isnan(cpu)):
        _bounded(cpu, "cpu", hi=MAX_CORES, unit="cores")


def check_curve(
    *,
    rate_lo: float,
    rate_hi: float,
    cpu: Sequence[float],
    band: float,
    grid_points: int,
    rate_range: Sequence[float] | None = None,
) -> None:
    """A tabulated demand curve as stored: grid values and band finite and within
    ``[0, MAX_CORES]``, exactly ``grid_points`` values, ``0 <= rate_lo < rate_hi <=
    MAX_RATE``, and the artifact's stated ``rate_range`` equal to the curve's."""
    lo = _bounded(rate_lo, "curve.rate_lo", hi=MAX_RATE, unit="req/s")
    hi = _bounded(rate_hi, "curve.rate_hi", hi=MAX_RATE, unit="req/s")
    if not lo < hi:
        raise BoundError("curve: rate_lo must be below rate_hi")
    if len(cpu) != grid_points:
        raise BoundError(f"curve.cpu: holds {len(cpu)} grid values, this version reads exactly {grid_points}")
    for i, v in enumerate(cpu):
        _bounded(v, f"curve.cpu[{i}]", hi=MAX_CORES, unit="cores")
    _bounded(band, "curve.band", hi=MAX_CORES, unit="cores")
    if rate_range is not None:
        if len(rate_range) != 2 or (float(rate_range[0]), float(rate_range[1])) != (lo, hi):
            raise BoundError("rate_range: differs from the curve's [rate_lo, rate_hi]")
