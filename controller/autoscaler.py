"""Replica arithmetic of a horizontal autoscaler, and CPU sizing that works with it.

Pure functions: plain values in, frozen dataclasses out; nothing here talks to
Kubernetes. The integration into decide/reconcile is done elsewhere.

The autoscaler's rule (Kubernetes docs, "Horizontal Pod Autoscaling", section
"Algorithm details"; autoscaling/v2)::

    desiredReplicas = ceil(currentReplicas × currentMetricValue / desiredMetricValue)

and no scaling while the ratio current/desired lies within the tolerance of 1.0
(0.1 by default, cluster-wide; since Kubernetes 1.33 settable per HPA as
``behavior.scaleUp.tolerance`` / ``behavior.scaleDown.tolerance``, the blog post
"Kubernetes v1.33: HorizontalPodAutoscaler Configurable Tolerance"). For a
``Utilization`` target the metric is the pods' average usage as a percentage of
their request; for an ``AverageValue`` target it is the metric's per-pod average.

Two sizings follow from it:

- **An autoscaler on a per-pod request rate** (a ``Pods``, or ``Object``/``External``
  metric with an ``AverageValue`` target T req/s): a pod's rate drifts up to
  T × (1 + tolerance) before a pod is added, so a pod must be sized for demand at
  max(observed per-pod rate, T × (1 + tolerance)) — :func:`size_for_rate_target`.
- **An autoscaler on CPU utilisation u** (``Resource`` cpu, ``Utilization``): with
  request R per pod it settles where a pod's demand equals u·R, i.e. each pod
  carries r req/s with demand(r) = u·R, and the workload needs ceil(total / r)
  replicas, reserving replicas × R cores. :func:`size_with_cpu_autoscaler` tries
  candidate requests and returns the one reserving the least CPU, keeping r within
  the demand curve's trained range and the per-pod capacity.

"Cores per 100 req/s" = reserved cores / total rate × 100: what serving load costs
in reserved CPU, comparable across workloads and sizes.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from ratefit.models.errors import InputError

__all__ = [
    "DEFAULT_TOLERANCE",
    "DEFAULT_SCALE_DOWN_WINDOW_S",
    "RecommendationWindow",
    "desired_replicas",
    "RateTargetSizing",
    "size_for_rate_target",
    "CoupledSize",
    "CpuAutoscalerSizing",
    "settle_rate",
    "coupled_size",
    "size_with_cpu_autoscaler",
    "cores_per_100_rps",
]

#: the autoscaler's default tolerance (Kubernetes docs, "Horizontal Pod Autoscaling")
DEFAULT_TOLERANCE = 0.1
_MAX_CANDIDATES = 4000


def _finite(name: str, v: float, *, positive: bool = False, nonneg: bool = False) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        raise InputError(f"{name}: {v!r} is not a number") from None
    if not math.isfinite(f) or (positive and f <= 0) or (nonneg and f < 0):
        want = "a positive" if positive else "a non-negative" if nonneg else "a finite"
        raise InputError(f"{name}: {v!r} must be {want} finite number")
    return f


def desired_replicas(
    current_replicas: int,
    current_value: float,
    target_value: float,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    scale_up_tolerance: float | None = None,
    scale_down_tolerance: float | None = None,
    min_replicas: int | None = None,
    max_replicas: int | None = None,
) -> int:
    """The replica count the autoscaler asks for (see the module docstring).

    ``current_value``/``target_value`` are the per-pod averages (or utilisation
    percentages). Within the tolerance the count stays; ``scale_up_tolerance`` and
    ``scale_down_tolerance`` override ``tolerance`` for the two directions.
    The result is clamped to [min_replicas, max_replicas] when given."""
    if int(current_replicas) != current_replicas or current_replicas < 0:
        raise InputError(f"current replicas: {current_replicas!r} must be a whole number >= 0")
    cur = _finite("current metric value", current_value, nonneg=True)
    tgt = _finite("target metric value", target_value, positive=True)
    up = _finite("tolerance", tolerance if scale_up_tolerance is None else scale_up_tolerance, nonneg=True)
    down = _finite("tolerance", tolerance if scale_down_tolerance is None else scale_down_tolerance, nonneg=True)
    n = int(current_replicas)
    ratio = cur / tgt
    if 1.0 - down <= ratio <= 1.0 + up or n == 0:
        out = n
    else:
        # a tiny epsilon keeps 50 × 90/75 = 60.000000000000007 at 60, as integer arithmetic would
        out = math.ceil(n * ratio - 1e-9)
    if min_replicas is not None:
        out = max(out, int(min_replicas))
    if max_replicas is not None:
        out = min(out, int(max_replicas))
    return out


# -- the stabilization window -------------------------------------------------------

#: behavior.scaleDown.stabilizationWindowSeconds when unset (autoscaling/v2 API reference,
#: HPAScalingRules: "For scale down: 300"; scale up: 0, no stabilization); at most 3600
DEFAULT_SCALE_DOWN_WINDOW_S = 300.0
MAX_STABILIZATION_WINDOW_S = 3600.0


class RecommendationWindow:
    """The autoscaler's memory of its recent recommendations, which damps scaling down
    (KEP-853 "Configurable scale velocity for HPA", algorithm pseudocode; the API
    reference's HPAScalingRules.stabilizationWindowSeconds): each sync it records its
    recommendation, and the count it sets is

    * at least the lowest recommendation within the scale-up window (0 s by default:
      the recommendation itself, so scaling up is immediate),
    * at most the highest recommendation within the scale-down window (300 s by
      default: the count falls only when every recommendation of the last 5 minutes
      is lower),

    starting from the current count. A recommendation counts while its time is after
    ``now - window``. Pure: times are the caller's (simulated seconds)."""

    __slots__ = ("down_s", "up_s", "_recs")

    def __init__(self, *, down_s: float = DEFAULT_SCALE_DOWN_WINDOW_S, up_s: float = 0.0) -> None:
        self.down_s = _finite("scale-down stabilization window", down_s, nonneg=True)
        self.up_s = _finite("scale-up stabilization window", up_s, nonneg=True)
        if max(self.down_s, self.up_s) > MAX_STABILIZATION_WINDOW_S:
            raise InputError(f"a stabilization window is at most {MAX_STABILIZATION_WINDOW_S:.0f} s "
                             f"(autoscaling/v2), got {max(self.down_s, self.up_s):g}")
        self._recs: list[tuple[float, int]] = []  # (time, recommendation), oldest first

    def stabilize(self, now: float, current: int, recommendation: int) -> int:
        """Record ``recommendation`` made at ``now`` and return the count to set."""
        keep = max(self.down_s, self.up_s)
        self._recs = [(t, r) for t, r in self._recs if t > now - keep]
        up = min([recommendation] + [r for t, r in self._recs if t > now - self.up_s])
        down = max([recommendation] + [r for t, r in self._recs if t > now - self.down_s])
        self._recs.append((now, int(recommendation)))
        out = int(current)
        if out < up:
            out = up
        if out > down:
            out = down
        return out


# -- an autoscaler on a per-pod request rate ----------------------------------------


@dataclass(frozen=True, slots=True)
class RateTargetSizing:
    """What rate to size one pod for under an autoscaler on a per-pod rate."""

    observed_rate: float  # req/s per pod now
    target_rate: float  # the autoscaler's AverageValue target T, req/s per pod
    tolerance: float
    sizing_rate: float  # max(observed, T × (1 + tolerance))
    by_target: bool  # True when the autoscaler's target decides
    over_capacity: bool  # sizing_rate above the measured per-pod capacity
    message: str


def size_for_rate_target(
    observed_rate: float,
    target_rate: float,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    capacity: float | None = None,
) -> RateTargetSizing:
    """The per-pod rate to look demand up at (see the module docstring)."""
    obs = _finite("observed per-pod rate", observed_rate, nonneg=True)
    tgt = _finite("autoscaler target rate", target_rate, positive=True)
    tol = _finite("tolerance", tolerance, nonneg=True)
    ceiling = tgt * (1.0 + tol)
    by_target = ceiling >= obs
    rate = ceiling if by_target else obs
    over = capacity is not None and rate > _finite("capacity", capacity, positive=True)
    if by_target:
        msg = (
            f"sized for the autoscaler's target {tgt:g} req/s per pod "
            f"(pods reach {ceiling:g} req/s within its {tol:g} tolerance)"
        )
    else:
        msg = f"sized for the observed {obs:g} req/s per pod, above the autoscaler's target {tgt:g} req/s"
    if over:
        msg += f"; above the measured per-pod capacity {capacity:g} req/s: lower the autoscaler's target"
    return RateTargetSizing(
        observed_rate=obs, target_rate=tgt, tolerance=tol, sizing_rate=rate,
        by_target=by_target, over_capacity=over, message=msg,
    )


# -- an autoscaler on CPU utilisation --------------------------------------------------


@dataclass(frozen=True, slots=True)
class CoupledSize:
    """Where the autoscaler settles for a CPU request: per pod, and for the workload."""

    request: float  # cores per pod
    settle_rate: float  # r with demand(r) = u·R: the per-pod rate the autoscaler holds pods at
    per_pod_rate: float  # total / replicas: what a pod carries once the replicas are rounded up
    replicas: int
    reserved: float  # replicas × request, cores
    cores_per_100_rps: float


@dataclass(frozen=True, slots=True)
class CpuAutoscalerSizing:
    """The request that reserves the least CPU under a CPU-utilisation autoscaler."""

    best: CoupledSize | None  # None when no candidate settles inside the allowed range
    current: CoupledSize | None  # the same figures at today's request, when given and settling
    total_rate: float
    utilization: float  # share, e.g. 0.7 for averageUtilization 70
    rate_range: tuple[float, float]  # per-pod rates allowed (trained range ∩ capacity)
    candidates: int
    message: str


def cores_per_100_rps(reserved_cores: float, total_rate: float) -> float:
    """Reserved cores per 100 req/s of total load (NaN without load)."""
    return 100.0 * reserved_cores / total_rate if total_rate > 0 else math.nan


def _demand_fn(demand: Any, bound: bool) -> tuple[Callable[[float], float], tuple[float, float] | None]:
    """A rate → cores callable and the trained range, from a DemandCurve or a callable."""
    look = getattr(demand, "lookup_one", None)
    if look is not None:
        i = 1 if bound else 0
        return (lambda r: float(look(r)[i])), (float(demand.rate_lo), float(demand.rate_hi))
    if callable(demand):
        return (lambda r: float(demand(r))), None
    raise InputError("demand must be a DemandCurve or a callable rate (req/s) -> cores")


def settle_rate(
    demand: Callable[[float], float], request: float, utilization: float, lo: float, hi: float
) -> float | None:
    """The highest per-pod rate r in [lo, hi] with demand(r) ≤ utilization × request,
    when the settling point demand(r) = u·R lies inside [lo, hi]; else None."""
    goal = utilization * request
    if demand(lo) > goal * (1 + 1e-12) or demand(hi) < goal * (1 - 1e-12):
        return None
    if demand(hi) <= goal:
        return hi
    a, b = lo, hi
    for _ in range(60):  # demand is non-decreasing: bisect on demand(r) <= goal
        m = (a + b) / 2
        if demand(m) <= goal:
            a = m
        else:
            b = m
        if b - a <= 1e-9 * max(1.0, hi):
            break
    return a


def coupled_size(
    demand: Callable[[float], float],
    request: float,
    *,
    total_rate: float,
    utilization: float,
    lo: float,
    hi: float,
    min_replicas: int = 1,
    max_replicas: int | None = None,
) -> CoupledSize | None:
    """The settling point for one request R: the autoscaler holds pods where
    demand(r) = u·R and runs ceil(total / r) replicas. None when even the lowest
    rate ``lo`` needs more than u·R, when the pods would then carry more than
    ``hi`` req/s each (beyond the trained range or the capacity), or when more than
    ``max_replicas`` are needed. The settle rate itself may lie a little above
    ``hi`` (the demand function is asked there: a DemandCurve extrapolates) as long
    as the rounded-up replicas keep each pod at or below ``hi``."""
    if total_rate <= 0:
        return None
    r = settle_rate(demand, request, utilization, lo, max(hi, total_rate))
    if r is None or r <= 0:
        return None
    replicas = math.ceil(total_rate / r - 1e-6)
    if demand(total_rate / replicas) > utilization * request * (1 + 1e-9):
        replicas += 1  # r came out of the bisection a hair too high
    replicas = max(int(min_replicas), replicas)
    if max_replicas is not None and replicas > max_replicas:
        return None
    per_pod = total_rate / replicas
    if per_pod > hi * (1 + 1e-9):
        return None
    reserved = replicas * request
    return CoupledSize(
        request=request,
        settle_rate=r,
        per_pod_rate=per_pod,
        replicas=replicas,
        reserved=reserved,
        cores_per_100_rps=cores_per_100_rps(reserved, total_rate),
    )


def size_with_cpu_autoscaler(
    demand: Any,
    *,
    total_rate: float,
    target_utilization_percent: float,
    current_request: float | None = None,
    candidates: Sequence[float] | None = None,
    rate_range: tuple[float, float] | None = None,
    capacity: float | None = None,
    min_replicas: int = 1,
    max_replicas: int | None = None,
    step_m: int = 5,
    bound: bool = False,
) -> CpuAutoscalerSizing:
    """Try candidate requests (cores; default every ``step_m`` millicores over the
    range the curve allows) and return the one reserving the least CPU for
    ``total_rate`` req/s under an autoscaler holding ``target_utilization_percent``
    (the HPA's ``averageUtilization``). ``demand`` is a DemandCurve (its demand, or
    its upper band with ``bound=True``; its trained range) or a callable
    rate → cores with ``rate_range``. Pods carry at most the top of the trained
    range and at most ``capacity`` req/s each; below the range the curve's flat
    extrapolation over-states demand, which errs on the safe side. Ties go to the
    larger request (fewer pods)."""
    fn, trained = _demand_fn(demand, bound)
    if rate_range is not None:
        lo, hi = (_finite("rate range", rate_range[0], nonneg=True), _finite("rate range", rate_range[1], positive=True))
    elif trained is not None:
        lo, hi = trained
    else:
        raise InputError("rate_range (lo, hi) is required with a demand callable: the rates the curve was trained on")
    if not hi > lo:
        raise InputError(f"rate range [{lo:g}, {hi:g}] must have lo < hi")
    total = _finite("total rate", total_rate, nonneg=True)
    u = _finite("target utilisation percent", target_utilization_percent, positive=True) / 100.0
    if capacity is not None:
        hi = min(hi, _finite("capacity", capacity, positive=True))
        if hi <= lo:
            raise InputError(f"capacity {capacity:g} req/s lies below the curve's trained range (from {lo:g} req/s)")
    if candidates is None:
        r_lo = fn(lo) / u
        r_hi = fn(hi) / u
        step = max(1, int(step_m)) / 1000.0
        first = max(step, math.ceil(r_lo / step - 1e-9) * step)
        # one step past r_hi: rounded up to the grid, the top request still keeps pods within range
        n = int(math.ceil((r_hi - first) / step - 1e-9)) + 1
        if n > _MAX_CANDIDATES:
            step *= math.ceil(n / _MAX_CANDIDATES)
            n = int(math.ceil((r_hi - first) / step - 1e-9)) + 1
        cands = [round(first + i * step, 6) for i in range(max(0, n))]
    else:
        cands = [_finite("candidate request", c, positive=True) for c in candidates]
    kw = dict(total_rate=total, utilization=u, lo=lo, hi=hi, min_replicas=min_replicas, max_replicas=max_replicas)
    best: CoupledSize | None = None
    for req in cands:
        pt = coupled_size(fn, req, **kw)
        if pt is None:
            continue
        if best is None or pt.reserved < best.reserved - 1e-12 or (
            abs(pt.reserved - best.reserved) <= 1e-12 and pt.request > best.request
        ):
            best = pt
    current = None
    if current_request is not None:
        current = coupled_size(fn, _finite("current request", current_request, positive=True), **kw)
    if best is None:
        msg = (
            f"no request settles the autoscaler ({100 * u:g}% utilisation) at a per-pod rate within "
            f"[{lo:g}, {hi:g}] req/s"
        )
    else:
        msg = (
            f"request {round(best.request * 1000)}m: the autoscaler settles at {best.per_pod_rate:.4g} req/s per pod, "
            f"{best.replicas} replicas, {best.reserved:.4g} cores reserved "
            f"({best.cores_per_100_rps:.3g} cores per 100 req/s)"
        )
        if current is not None:
            msg += (
                f"; today {round(current.request * 1000)}m: {current.replicas} replicas, {current.reserved:.4g} cores "
                f"({current.cores_per_100_rps:.3g} cores per 100 req/s)"
            )
    return CpuAutoscalerSizing(
        best=best, current=current, total_rate=total, utilization=u, rate_range=(lo, hi),
        candidates=len(cands), message=msg,
    )
