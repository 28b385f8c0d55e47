"""Rates and usage from the history's counters, with no look-ahead.

**Rates.** At a simulated time ``T`` the live loop asks Prometheus for, per pod, the
φ-quantile over ``rateWindow`` W of ``rate(M[R])`` sampled every S (a subquery,
``controller/metrics_source``), and takes the busiest pod. Here the same numbers come
from the counters: ``rate()`` at every multiple of S (``metrics_source.extrapolated_rate``
— the same function the offline rate source uses, checked against the real server), then
for each pass the quantile (numpy's default 'linear' = Prometheus ``quantile_over_time``,
Hyndman & Fan type 7) of the values at the multiples of S in [T − W, T]
(``metrics_source.subquery_times``). A rate at time t reads only samples in
[t − R, t], so a pass at T reads nothing after T: no look-ahead by construction, and
``tests/test_replay.py`` appends a future spike to prove it.

**Usage.** Per pod, container and minute (t − 60 s, t]: the increase of the CPU counter
(counter resets corrected, values linearly interpolated at the minute's edges between
the samples around them) divided by 60 s, in cores; defined only for minutes inside the
series' first and last sample.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ratefit.controller.metrics_source import extrapolated_rate
from ratefit.controller.replay.history import Counter

__all__ = ["MINUTE", "PodUsage", "pass_windows", "pod_rate_grid", "window_quantiles", "workload_rates", "pod_usage"]

MINUTE = 60.0


def _ms(x: float) -> int:
    return int(round(x * 1000))


@dataclass(frozen=True)
class Windows:
    """The subquery grid and each pass's slice of it."""

    grid: np.ndarray  # evaluation times (s), multiples of the step
    lo: np.ndarray  # first grid index of each pass's window
    hi: np.ndarray  # one past the last


def pass_windows(pass_times: np.ndarray, *, window_s: float, step_s: float) -> Windows:
    """For each pass time T the grid indices of the multiples of ``step_s`` in [T − W, T]
    (the same times as ``metrics_source.subquery_times``)."""
    s = _ms(step_s)
    w = _ms(window_s)
    at = np.round(np.asarray(pass_times, dtype=float) * 1000).astype(np.int64)
    first = -((w - at) // s) * s  # ceil((at − w)/s)·s
    last = (at // s) * s
    g0 = int(first.min())
    grid = np.arange(g0, int(last.max()) + 1, s, dtype=np.int64)
    lo = (first - g0) // s
    hi = (last - g0) // s + 1
    return Windows(grid=grid / 1000.0, lo=lo, hi=hi)


def pod_rate_grid(counters: Sequence[Counter], grid: np.ndarray, *, interval_s: float) -> np.ndarray:
    """``sum by (pod) (rate(M[interval]))`` of one pod's series at every grid time (NaN
    where no series has two samples in the interval); several series add up where both
    have a value, like the offline rate source."""
    out: np.ndarray | None = None
    for ts, vs in counters:
        if len(ts) < 2:
            continue
        lo = int(np.searchsorted(grid, ts[0], side="left"))
        hi = int(np.searchsorted(grid, ts[-1] + interval_s, side="right"))
        r = np.full(grid.shape, np.nan)
        if hi > lo:
            r[lo:hi] = extrapolated_rate(ts, vs, grid[lo:hi], interval_s)
        if out is None:
            out = r
        else:
            out = np.where(np.isnan(out), r, np.where(np.isnan(r), out, out + r))
    return np.full(grid.shape, np.nan) if out is None else out


def _lerp(a: np.ndarray, b: np.ndarray, t: np.ndarray) -> np.ndarray:
    """numpy's own interpolation between order statistics (``numpy.percentile``'s
    ``_lerp``: a + (b − a)·t, computed from b's side when t ≥ ½), so the answers are the
    same floats as ``np.percentile`` gives for one window."""
    diff = b - a
    out = a + diff * t
    return np.where(t >= 0.5, b - diff * (1 - t), out)


def window_quantiles(values: np.ndarray, lo: np.ndarray, hi: np.ndarray, q: float) -> np.ndarray:
    """For each (lo, hi) the ``q``-quantile (0–1; numpy's default 'linear', Hyndman & Fan
    type 7 — the same floats as ``np.percentile(window, q × 100)``) of the finite values
    in ``values[lo:hi]``; NaN where there is none. Vectorised over the windows: missing
    values sort last as +inf and each row interpolates between its own order statistics."""
    n = len(lo)
    out = np.full(n, np.nan)
    if n == 0:
        return out
    qq = (q * 100.0) / 100.0  # as np.percentile turns q × 100 back into a fraction
    filled = np.where(np.isnan(values), np.inf, values)
    finite = np.concatenate([[0], np.cumsum(np.isfinite(filled))])
    count = finite[hi] - finite[lo]
    lengths = hi - lo
    for L in np.unique(lengths[count > 0]):
        rows = np.flatnonzero((lengths == L) & (count > 0))
        # bounded blocks keep the (rows × L) matrix small for long windows
        block = max(1, 4_000_000 // max(int(L), 1))
        for i in range(0, len(rows), block):
            part = rows[i:i + block]
            m = np.sort(filled[lo[part, None] + np.arange(int(L))], axis=1)
            c = count[part]
            virtual = (c - 1) * qq
            below = np.floor(virtual).astype(np.int64)
            above = np.minimum(below + 1, c - 1)
            r = np.arange(len(part))
            out[part] = _lerp(m[r, below], m[r, above], virtual - below)
    return out


def workload_rates(pods: Sequence[Sequence[Counter]], pass_times: np.ndarray, *, window_s: float, quantile: float,
                   step_s: float, interval_s: float) -> np.ndarray:
    """The rate the live loop would use at each pass: the busiest pod's ``quantile`` of
    its request rate over the window. NaN at passes where no pod has a rate."""
    win = pass_windows(pass_times, window_s=window_s, step_s=step_s)
    best = np.full(len(pass_times), np.nan)
    for counters in pods:
        r = pod_rate_grid(counters, win.grid, interval_s=interval_s)
        qv = window_quantiles(r, win.lo, win.hi, quantile)
        best = np.fmax(best, qv)
    return best


@dataclass(frozen=True)
class PodUsage:
    """One pod's container usage per minute: ``cores[i]`` is the minute ending at
    ``minute0 + i`` minutes of the replay's minute grid."""

    first: int
    cores: np.ndarray  # float32

    @property
    def stop(self) -> int:
        return self.first + len(self.cores)


def _corrected(vs: np.ndarray) -> np.ndarray:
    drops = np.concatenate([[0.0], np.where(np.diff(vs) < 0, vs[:-1], 0.0)])
    return vs + np.cumsum(drops)


def pod_usage(counters: Sequence[Counter], minutes: np.ndarray) -> PodUsage | None:
    """Cores used in each minute (t − 60, t] of ``minutes`` (minute end times), from the
    CPU counter(s) of one pod's container; None when no minute is covered."""
    total: np.ndarray | None = None
    lo_all = hi_all = None
    for ts, vs in counters:
        if len(ts) < 2:
            continue
        lo = int(np.searchsorted(minutes, ts[0] + MINUTE - 1e-9, side="left"))
        hi = int(np.searchsorted(minutes, ts[-1] + 1e-9, side="right"))
        if hi <= lo:
            continue
        c = _corrected(np.asarray(vs, dtype=float))
        t = minutes[lo:hi]
        u = (np.interp(t, ts, c) - np.interp(t - MINUTE, ts, c)) / MINUTE
        if total is None:
            total, lo_all, hi_all = u, lo, hi
        else:  # several series of one container: add where both cover the minute
            nlo, nhi = min(lo_all, lo), max(hi_all, hi)
            a = np.full(nhi - nlo, np.nan)
            a[lo_all - nlo:hi_all - nlo] = total
            b = np.full(nhi - nlo, np.nan)
            b[lo - nlo:hi - nlo] = u
            total = np.where(np.isnan(a), b, np.where(np.isnan(b), a, a + b))
            lo_all, hi_all = nlo, nhi
    if total is None:
        return None
    return PodUsage(first=int(lo_all), cores=np.maximum(total, 0.0).astype(np.float32))
