"""How a workload's horizontal autoscaler shapes its CPU sizing (pure; issue 14).

The arithmetic lives in ``controller/autoscaler.py``; this module reads a workload's
autoscalers (``workload.HorizontalScaler``) and a model's facts and says, per
container, what the decision should know:

- **An autoscaler on a per-pod request rate**: a ``Pods``, ``Object`` or ``External``
  metric with an ``AverageValue`` target T that is the policy's request rate — the
  metric named by ``spec.autoscalerRateMetric``, or, when that is unset, the
  autoscaler's only ``Pods`` metric (the message says it was taken by default; with
  several ``Pods`` metrics and no name nothing is assumed and the decision is as
  before). A pod's rate drifts up to T × (1 + tolerance) before a pod is added, so the
  sizing API is asked at max(observed per-pod rate, T × (1 + tolerance))
  (:func:`sizing_rate`, used by the observe stage before its batch call) and the
  review says "sized for the autoscaler's target T req/s per pod". An ``Object``
  metric with a ``Value`` target is a total, not a per-pod rate: never taken.
- **An autoscaler on CPU utilisation u** (``Resource`` or ``ContainerResource`` cpu,
  ``Utilization``; an autoscaler without metrics is the API's default 80 %): the
  coupled answer of :func:`ratefit.controller.autoscaler.size_with_cpu_autoscaler` on
  the model's curve (points the observe stage asked the sizing API for), within the
  trained range and the per-pod capacity, for the workload's current total rate
  (per-pod rate × current replicas — the rate is the policy's percentile of per-pod
  rates, so the total errs high).

"Cores per 100 req/s" (reserved cores per 100 req/s of total load) is reported now
(current request × replicas) and at the suggested size: the coupled answer's, or the
proposed request × the replicas the autoscaler runs at today's load (the documented
algorithm, :func:`~ratefit.controller.autoscaler.desired_replicas`), or without an
autoscaler the proposed request × today's replicas.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Sequence
from dataclasses import dataclass

from ratefit.controller.autoscaler import (
    CpuAutoscalerSizing,
    RateTargetSizing,
    cores_per_100_rps,
    desired_replicas,
    size_for_rate_target,
    size_with_cpu_autoscaler,
)
from ratefit.controller.workload import HorizontalScaler, ScalerMetric
from ratefit.models.errors import InputError

__all__ = [
    "RATE_SOURCES",
    "GRID_POINTS",
    "RateTarget",
    "CpuTarget",
    "AutoscalerView",
    "ModelFacts",
    "AutoscalerHint",
    "autoscaler_view",
    "sizing_rate",
    "curve_grid",
    "autoscaler_hint",
    "facts_from_curve",
]

#: metric sources whose AverageValue target is a per-pod average (autoscaling/v2 API reference)
RATE_SOURCES = ("Pods", "Object", "External")
#: rates asked of the sizing API per curve for the coupled answer (bounded; 32 is plenty
#: for a monotone curve tabulated on 129 points)
GRID_POINTS = 32


@dataclass(frozen=True, slots=True)
class RateTarget:
    """The autoscaler's per-pod request-rate target T (req/s per pod)."""

    metric: str
    source: str  # Pods | Object | External
    target: float
    by_default: bool  # taken as the only Pods metric (no spec.autoscalerRateMetric)


@dataclass(frozen=True, slots=True)
class CpuTarget:
    """A CPU ``Utilization`` target, in percent of the request."""

    utilization: float
    container: str | None = None  # ContainerResource: the one container measured


@dataclass(frozen=True, slots=True)
class AutoscalerView:
    """What one workload's autoscaler means for sizing."""

    hpa: str  # namespace/name
    replicas: int  # current replicas (the autoscaler's status, else the workload's)
    min_replicas: int
    max_replicas: int | None
    tolerance: float
    rate_target: RateTarget | None = None
    cpu: CpuTarget | None = None
    #: something the review should say (several autoscalers, several Pods metrics …)
    note: str = ""
    #: behavior.scaleDown.stabilizationWindowSeconds (the replay's replica simulation)
    scale_down_window_s: float = 300.0


@dataclass(frozen=True, slots=True)
class ModelFacts:
    """What the sizing API says about a model beyond one answer: the trained range, the
    per-pod capacity, and (for the coupled answer) demand at a grid of rates."""

    rate_lo: float
    rate_hi: float
    capacity: float | None = None
    rates: tuple[float, ...] = ()
    demand: tuple[float, ...] = ()  # cores, one per rate

    def __call__(self, rate: float) -> float:
        """Demand at ``rate`` by linear interpolation of the points; flat below the
        first, the last segment's slope above the last."""
        xs, ys = self.rates, self.demand
        if len(xs) < 2:
            raise InputError("ModelFacts: demand needs at least two grid points")
        if rate <= xs[0]:
            return ys[0]
        i = bisect.bisect_right(xs, rate)
        if i >= len(xs):
            i = len(xs) - 1
        x0, x1, y0, y1 = xs[i - 1], xs[i], ys[i - 1], ys[i]
        return y0 + (y1 - y0) * (rate - x0) / (x1 - x0)


@dataclass(frozen=True, slots=True)
class AutoscalerHint:
    """Per container: what the autoscaler changes in the decision and the review."""

    rate: RateTargetSizing | None = None
    coupled: CpuAutoscalerSizing | None = None
    #: the coupled answer's request, millicores (None: no answer)
    coupled_m: int | None = None
    #: the replicas the autoscaler runs at today's load (documented algorithm)
    replicas_after: int | None = None
    message: str = ""


def _rate_candidates(metrics: Sequence[ScalerMetric]) -> list[ScalerMetric]:
    return [m for m in metrics if m.source in RATE_SOURCES and m.target_type == "AverageValue"
            and m.average_value is not None and m.average_value > 0]


def autoscaler_view(
    hpas: Sequence[HorizontalScaler], *, metric_name: str | None, workload_replicas: int,
) -> AutoscalerView | None:
    """The view of the autoscaler(s) targeting one workload (None: there is none)."""
    if not hpas:
        return None
    ordered = sorted(hpas, key=lambda h: h.name)
    h = ordered[0]
    notes = []
    if len(ordered) > 1:
        notes.append(f"{len(ordered)} HorizontalPodAutoscalers target this workload (the autoscaler refuses to "
                     f"act then); read {h.name}")
    rate: RateTarget | None = None
    cands = _rate_candidates(h.metrics)
    if metric_name:
        named = [m for m in cands if m.name == metric_name]
        if named:
            m = named[0]
            rate = RateTarget(metric=m.name, source=m.source, target=float(m.average_value or 0), by_default=False)
        else:
            notes.append(f"autoscaler {h.name} has no Pods/Object/External metric {metric_name!r} with an "
                         "AverageValue target; fix spec.autoscalerRateMetric")
    else:
        pods = [m for m in h.metrics if m.source == "Pods"]
        if len(pods) == 1 and pods[0] in cands:
            m = pods[0]
            rate = RateTarget(metric=m.name, source=m.source, target=float(m.average_value or 0), by_default=True)
        elif len(pods) > 1:
            names = ", ".join(sorted(m.name for m in pods))
            notes.append(f"autoscaler {h.name} scales on several Pods metrics ({names}); set "
                         "spec.autoscalerRateMetric to size for its target")
    cpu = next((CpuTarget(m.utilization, m.container if m.source == "ContainerResource" else None)
                for m in h.metrics
                if m.source in ("Resource", "ContainerResource") and m.name == "cpu"
                and m.target_type == "Utilization" and m.utilization), None)
    replicas = h.current_replicas if h.current_replicas is not None else workload_replicas
    return AutoscalerView(
        hpa=f"{h.namespace}/{h.name}", replicas=max(0, int(replicas)),
        min_replicas=h.min_replicas if h.min_replicas is not None else 1,
        max_replicas=h.max_replicas, tolerance=h.tolerance, rate_target=rate, cpu=cpu, note="; ".join(notes),
        scale_down_window_s=h.scale_down_window_s,
    )


def sizing_rate(view: AutoscalerView | None, observed: float | None, *, capacity: float | None = None) -> float | None:
    """The per-pod rate to ask the sizing API at: max(observed, T × (1 + tolerance))
    under a rate target, else the observed rate (None stays None: NoMetrics)."""
    if observed is None or view is None or view.rate_target is None:
        return observed
    return size_for_rate_target(observed, view.rate_target.target, tolerance=view.tolerance,
                                capacity=capacity).sizing_rate


def curve_grid(rate_lo: float, rate_hi: float, points: int = GRID_POINTS) -> tuple[float, ...]:
    """``points`` evenly spaced rates over the trained range (both ends included)."""
    if not (math.isfinite(rate_lo) and math.isfinite(rate_hi) and 0 <= rate_lo < rate_hi):
        raise InputError(f"trained range [{rate_lo}, {rate_hi}] must have 0 <= lo < hi")
    n = max(2, int(points))
    return tuple(rate_lo + (rate_hi - rate_lo) * i / (n - 1) for i in range(n))


def facts_from_curve(curve: object, *, capacity: float | None = None, points: int = GRID_POINTS) -> ModelFacts:
    """ModelFacts from a ``models.curve.DemandCurve`` read from the store directly (the
    replay, tools without the sizing API): its demand at :func:`curve_grid` rates."""
    lo, hi = float(curve.rate_lo), float(curve.rate_hi)  # type: ignore[attr-defined]
    grid = curve_grid(lo, hi, points)
    look = curve.lookup_one  # type: ignore[attr-defined]
    return ModelFacts(rate_lo=lo, rate_hi=hi, capacity=capacity, rates=grid,
                      demand=tuple(float(look(r)[0]) for r in grid))


def autoscaler_hint(
    view: AutoscalerView | None, *, container: str, observed_rate: float | None, current_m: int | None,
    facts: ModelFacts | None,
) -> AutoscalerHint:
    """What the autoscaler means for one container's decision (see the module docstring)."""
    if view is None:
        return AutoscalerHint()
    parts = [view.note] if view.note else []
    rate_s: RateTargetSizing | None = None
    coupled: CpuAutoscalerSizing | None = None
    coupled_m: int | None = None
    after: int | None = None
    capacity = facts.capacity if facts is not None else None
    if view.rate_target is not None and observed_rate is not None:
        t = view.rate_target
        rate_s = size_for_rate_target(observed_rate, t.target, tolerance=view.tolerance, capacity=capacity)
        how = (f"the autoscaler's only Pods metric {t.metric!r} taken as the request rate "
               "(spec.autoscalerRateMetric unset)") if t.by_default else f"{t.source} metric {t.metric!r}"
        parts.append(f"{rate_s.message} ({how})")
        after = desired_replicas(view.replicas, observed_rate, t.target, tolerance=view.tolerance,
                                 min_replicas=view.min_replicas, max_replicas=view.max_replicas)
    if (view.cpu is not None and observed_rate is not None and observed_rate > 0
            and (view.cpu.container is None or view.cpu.container == container)):
        if facts is None or len(facts.rates) < 2:
            parts.append("no curve points from the sizing API for the coupled answer this pass")
        else:
            try:
                coupled = size_with_cpu_autoscaler(
                    facts, total_rate=observed_rate * max(1, view.replicas),
                    target_utilization_percent=view.cpu.utilization,
                    current_request=None if not current_m else current_m / 1000.0,
                    rate_range=(facts.rate_lo, facts.rate_hi), capacity=capacity,
                    min_replicas=view.min_replicas, max_replicas=view.max_replicas,
                )
            except InputError as exc:
                parts.append(f"no coupled answer: {exc}")
            else:
                if coupled.best is not None:
                    coupled_m = int(round(coupled.best.request * 1000))
                text = f"with the autoscaler at {view.cpu.utilization:g}% CPU: {coupled.message}"
                if coupled.best is not None and coupled.current is None and current_m:
                    lo, hi = coupled.rate_range
                    top = f", at most {view.max_replicas} replicas" if view.max_replicas is not None else ""
                    text += (f"; today {current_m}m has no settling point with pods within [{lo:g}, {hi:g}] "
                             f"req/s{top}")
                parts.append(text)
    return AutoscalerHint(rate=rate_s, coupled=coupled, coupled_m=coupled_m, replicas_after=after,
                          message="; ".join(p for p in parts if p))


def cores_per_100(request_m: int | None, per_pod_rate: float | None, replicas: int, replicas_after: int) -> float | None:
    """Reserved cores per 100 req/s: request × replicas over the total rate
    (per-pod rate × ``replicas``), with ``replicas_after`` pods reserving."""
    if request_m is None or per_pod_rate is None or per_pod_rate <= 0 or replicas <= 0:
        return None
    return cores_per_100_rps(request_m / 1000.0 * replicas_after, per_pod_rate * replicas)
