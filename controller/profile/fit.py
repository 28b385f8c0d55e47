"""Least-squares line through (rate, cores) points and its coefficient of determination.

By the Utilization Law (U = X·S, Denning & Buzen 1978) a service whose CPU cost
per request S does not change with load uses U = S·X cores at throughput X, plus
whatever it burns idle: the slope of the line is S (cores per req/s = CPU seconds
per request) and the intercept the idle CPU. R² = 1 − SS_res/SS_tot says how well
a straight line explains the points (1 = exactly).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = ["LinearFit", "linear_fit"]


@dataclass(frozen=True, slots=True)
class LinearFit:
    slope: float  # cores per req/s
    intercept: float  # cores
    r2: float  # NaN when every y is equal
    n: int

    def at(self, rate: float) -> float:
        return self.intercept + self.slope * rate

    @property
    def marginal_cores_per_100_rps(self) -> float:
        """Extra cores per extra 100 req/s (the slope); not the reserved cost per 100 req/s."""
        return 100.0 * self.slope


def linear_fit(x: Sequence[float], y: Sequence[float]) -> LinearFit | None:
    """Ordinary least squares of ``y`` on ``x`` over the finite pairs; None with fewer
    than two points or when every x is equal."""
    pts = [(float(a), float(b)) for a, b in zip(x, y) if math.isfinite(a) and math.isfinite(b)]
    n = len(pts)
    if n < 2:
        return None
    mx = sum(p[0] for p in pts) / n
    my = sum(p[1] for p in pts) / n
    sxx = sum((p[0] - mx) ** 2 for p in pts)
    if sxx <= 0:
        return None
    sxy = sum((p[0] - mx) * (p[1] - my) for p in pts)
    slope = sxy / sxx
    intercept = my - slope * mx
    ss_tot = sum((p[1] - my) ** 2 for p in pts)
    ss_res = sum((p[1] - intercept - slope * p[0]) ** 2 for p in pts)
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else math.nan
    return LinearFit(slope=slope, intercept=intercept, r2=r2, n=n)
