"""DemandCurve: a learned model of CPU demand (cores) as a function of request
rate per pod (req/s), tabulated so that lookups never call an estimator.

The chosen estimator is evaluated once, at training time, on a uniform grid over
the trained rate range, made non-decreasing (isotonic least squares on the grid:
more load never needs less CPU), and stored with the upper band (a split-conformal
quantile of out-of-fold residuals, see ``models.select``). A lookup is linear
interpolation on that grid:

- inside ``[rate_lo, rate_hi]``: interpolate; ``extrapolated`` is False;
- above ``rate_hi``: continue linearly with the least-squares slope of the top
  quarter of the curve (never negative); ``extrapolated`` is True;
- below ``rate_lo``: hold the curve's value at ``rate_lo`` (never extrapolate
  downwards towards zero CPU); ``extrapolated`` is True.

``CurveBank`` stacks many curves into 2-D arrays so one vectorised call serves a
batch of lookups spread over many keys (the sizing API's batch endpoint).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ratefit.models.errors import ArtifactError, InputError

#: points on the tabulation grid (uniform in rate); 129 gives 128 segments
GRID_POINTS = 129
#: share of the grid (its top end) whose least-squares slope continues the curve
#: beyond the trained range; a quarter smooths the steps an isotonic fit leaves
TOP_SHARE = 0.25


#: the largest millicore value converted (2**53: every integer up to it is exact in a
#: float); conversions saturate there instead of wrapping (an int64 cast of 1e20
#: would give -9223372036854775808)
MAX_MILLICORES = 2**53


def to_millicores(cores: float) -> int:
    """Cores → integer millicores, rounded up (1m is Kubernetes' CPU precision);
    saturates at ``MAX_MILLICORES``; InputError for a non-finite value."""
    if not math.isfinite(cores):
        raise InputError("demand: not a finite number of cores")
    return int(math.ceil(round(min(max(cores, 0.0), MAX_MILLICORES / 1000.0) * 1000.0, 6)))


@dataclass(frozen=True)
class CurveLookup:
    """Result of a vectorised lookup: arrays of equal length, cores."""

    demand: np.ndarray
    upper: np.ndarray
    extrapolated: np.ndarray

    def millicores(self) -> tuple[np.ndarray, np.ndarray]:
        """Demand and upper in integer millicores, rounded up."""
        # clipped before the int64 cast so that an absurd value saturates, never wraps
        with np.errstate(over="ignore"):  # 1e308 × 1000 is inf, then clipped
            return (
                np.ceil(np.round(np.clip(self.demand * 1000.0, 0.0, MAX_MILLICORES), 6)).astype(np.int64),
                np.ceil(np.round(np.clip(self.upper * 1000.0, 0.0, MAX_MILLICORES), 6)).astype(np.int64),
            )


class DemandCurve:
    """A tabulated, non-decreasing demand curve with an upper band.

    ``cpu`` holds cores on a uniform grid from ``rate_lo`` to ``rate_hi``;
    ``band`` (cores, ≥ 0) is added to the demand to give the upper bound.
    """

    __slots__ = ("rate_lo", "rate_hi", "cpu", "band", "slope", "_cpu_list", "_step")

    def __init__(self, *, rate_lo: float, rate_hi: float, cpu: Sequence[float], band: float) -> None:
        values = np.asarray(cpu, dtype=float)
        if values.ndim != 1 or values.size < 2:
            raise ArtifactError("curve: needs at least 2 grid values")
        if not (math.isfinite(rate_lo) and math.isfinite(rate_hi)) or not rate_hi > rate_lo >= 0:
            raise ArtifactError(f"curve: rate range [{rate_lo}, {rate_hi}] must satisfy 0 <= lo < hi")
        if not np.all(np.isfinite(values)) or np.any(values < 0):
            raise ArtifactError("curve: grid values must be finite and >= 0 cores")
        if np.any(np.diff(values) < -1e-12):
            raise ArtifactError("curve: grid values must be non-decreasing in rate")
        if not math.isfinite(band) or band < 0:
            raise ArtifactError(f"curve: band {band!r} must be a finite number >= 0 cores")
        self.rate_lo = float(rate_lo)
        self.rate_hi = float(rate_hi)
        self.cpu = values
        self.cpu.setflags(write=False)
        self.band = float(band)
        n = values.size
        k = max(1, int(round((n - 1) * TOP_SHARE)))
        self._step = (self.rate_hi - self.rate_lo) / (n - 1)
        top = values[-1 - k :]
        x = np.arange(top.size, dtype=float) * self._step
        xc = x - x.mean()
        self.slope = max(0.0, float(np.dot(xc, top - top.mean()) / np.dot(xc, xc)))
        self._cpu_list = values.tolist()

    # -- construction -------------------------------------------------------------
    @classmethod
    def tabulate(
        cls,
        predict: Callable[[np.ndarray], np.ndarray],
        *,
        rate_lo: float,
        rate_hi: float,
        band: float,
        points: int = GRID_POINTS,
    ) -> DemandCurve:
        """Evaluate ``predict`` (rates → cores) on the grid and make it monotone."""
        grid = np.linspace(rate_lo, rate_hi, points)
        raw = np.asarray(predict(grid), dtype=float).reshape(-1)
        return cls(rate_lo=rate_lo, rate_hi=rate_hi, cpu=monotone(raw), band=band)

    @property
    def grid(self) -> np.ndarray:
        return np.linspace(self.rate_lo, self.rate_hi, self.cpu.size)

    # -- lookups ------------------------------------------------------------------
    def lookup(self, rates: float | Sequence[float] | np.ndarray) -> CurveLookup:
        """Vectorised lookup; rates must be finite and >= 0."""
        r = np.atleast_1d(np.asarray(rates, dtype=float))
        _check_rates(r)
        n = self.cpu.size
        t = (r - self.rate_lo) / self._step
        tc = np.clip(t, 0.0, n - 1)
        j = np.minimum(tc.astype(np.int64), n - 2)
        f = tc - j
        d = self.cpu[j] + f * (self.cpu[j + 1] - self.cpu[j])
        above = r > self.rate_hi
        d = np.where(above, self.cpu[-1] + self.slope * (r - self.rate_hi), d)
        extrap = above | (r < self.rate_lo)
        return CurveLookup(demand=d, upper=d + self.band, extrapolated=extrap)

    def lookup_one(self, rate: float) -> tuple[float, float, bool]:
        """One lookup in plain Python (no numpy call): (demand, upper, extrapolated)."""
        if not (rate >= 0.0 and rate != math.inf):
            raise InputError(f"rate: {rate!r} must be a finite number >= 0 req/s")
        cpu = self._cpu_list
        if rate > self.rate_hi:
            d = cpu[-1] + self.slope * (rate - self.rate_hi)
            return d, d + self.band, True
        if rate < self.rate_lo:
            return cpu[0], cpu[0] + self.band, True
        t = (rate - self.rate_lo) / self._step
        j = int(t)
        if j >= len(cpu) - 1:
            j = len(cpu) - 2
        f = t - j
        d = cpu[j] + f * (cpu[j + 1] - cpu[j])
        return d, d + self.band, False

    def to_dict(self) -> dict[str, object]:
        return {
            "rate_lo": self.rate_lo,
            "rate_hi": self.rate_hi,
            "cpu": [float(v) for v in self.cpu],
            "band": self.band,
        }

    def __repr__(self) -> str:
        return (
            f"DemandCurve(rate=[{self.rate_lo:g}, {self.rate_hi:g}] req/s, "
            f"cpu=[{self.cpu[0]:.4g}, {self.cpu[-1]:.4g}] cores, band={self.band:.4g})"
        )


def monotone(values: np.ndarray) -> np.ndarray:
    """Closest non-decreasing sequence in least squares (pool-adjacent-violators),
    clipped at 0 cores."""
    y = np.asarray(values, dtype=float)
    if not np.all(np.isfinite(y)):
        raise InputError("curve: the model predicted a non-finite CPU value on the grid")
    # pool adjacent violators, equal weights
    means: list[float] = []
    counts: list[int] = []
    for v in y.tolist():
        means.append(v)
        counts.append(1)
        while len(means) > 1 and means[-2] > means[-1]:
            c = counts[-2] + counts[-1]
            m = (means[-2] * counts[-2] + means[-1] * counts[-1]) / c
            means[-2:] = [m]
            counts[-2:] = [c]
    out = np.repeat(np.asarray(means), np.asarray(counts))
    return np.maximum(out, 0.0)


def _check_rates(r: np.ndarray) -> None:
    if not np.all(np.isfinite(r)) or np.any(r < 0):
        bad = r[~(np.isfinite(r) & (r >= 0))][0]
        raise InputError(f"rate: {bad!r} must be a finite number >= 0 req/s")


class CurveBank:
    """Many curves stacked into arrays for one vectorised lookup across keys.

    All curves must have the same number of grid points (true for every artifact
    this version writes). ``index_of`` maps keys to rows; ``lookup(rows, rates)``
    answers a batch in one numpy pass.
    """

    def __init__(self, curves: Mapping[str, DemandCurve]) -> None:
        keys = list(curves)
        self.keys: tuple[str, ...] = tuple(keys)
        self.index: dict[str, int] = {k: i for i, k in enumerate(keys)}
        if not keys:
            self.points = GRID_POINTS
            self._cpu = np.zeros((0, GRID_POINTS))
            self._lo = self._hi = self._step = self._slope = self._band = np.zeros(0)
            return
        sizes = {curves[k].cpu.size for k in keys}
        if len(sizes) != 1:
            raise ArtifactError(f"curve bank: curves have different grid sizes {sorted(sizes)}")
        self.points = sizes.pop()
        self._cpu = np.stack([curves[k].cpu for k in keys])
        self._lo = np.array([curves[k].rate_lo for k in keys])
        self._hi = np.array([curves[k].rate_hi for k in keys])
        self._step = (self._hi - self._lo) / (self.points - 1)
        self._slope = np.array([curves[k].slope for k in keys])
        self._band = np.array([curves[k].band for k in keys])

    def __len__(self) -> int:
        return len(self.keys)

    def rows(self, keys: Sequence[str]) -> np.ndarray:
        """Row index per key, -1 for unknown keys."""
        n = len(keys)
        return np.fromiter(map(self.index.get, keys, [-1] * n), dtype=np.int64, count=n)

    def lookup(self, rows: np.ndarray, rates: np.ndarray) -> CurveLookup:
        """Lookups for ``rows`` (indices into this bank, all >= 0) at ``rates``."""
        i = np.asarray(rows, dtype=np.int64)
        r = np.asarray(rates, dtype=float)
        _check_rates(r)
        n = self.points
        lo = self._lo[i]
        t = (r - lo) / self._step[i]
        tc = np.clip(t, 0.0, n - 1)
        j = np.minimum(tc.astype(np.int64), n - 2)
        f = tc - j
        c0 = self._cpu[i, j]
        d = c0 + f * (self._cpu[i, j + 1] - c0)
        hi = self._hi[i]
        above = r > hi
        d = np.where(above, self._cpu[i, n - 1] + self._slope[i] * (r - hi), d)
        return CurveLookup(demand=d, upper=d + self._band[i], extrapolated=above | (r < lo))
