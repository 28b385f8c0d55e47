"""What a horizontal autoscaler on CPU utilisation would run, pass by pass (issue 14).

Under an autoscaler on CPU ``Utilization`` the number of pods follows the request in
force (utilisation = usage ÷ request), so the CPU a strategy reserves is replicas ×
request, not request alone. Per autoscaled workload, pass and strategy:

* the workload's total request rate at the pass: the sum over its pods of ``rate()`` at
  the pass (``series.pod_rate_grid``, the replay's reproduction of Prometheus' ``rate``)
  — the load is what it was, however many pods carry it;
* one pod's CPU at per-pod rate r: the models' demand (the sizer's answers, rounded as
  the sizing API rounds them) summed over the containers the autoscaler measures
  (``Resource`` cpu: every container of the pod; ``ContainerResource``: its one
  container) — the Utilization Law U = X·S per pod (Denning & Buzen 1978) with the
  curve giving X·S at X = r;
* the autoscaler's rule, ``controller.autoscaler.desired_replicas`` (Kubernetes docs,
  "Horizontal Pod Autoscaling", algorithm details, tolerance), with utilisation
  100 × demand(total ÷ n) ÷ the pod's request, applied once per sync period (15 s, the
  default ``--horizontal-pod-autoscaler-sync-period``) between passes until it holds,
  within [minReplicas, maxReplicas];
* reserved CPU = replicas × the pod's request (cores), CPU-hours = its sum × step.

Strategies: the replay's ``current``, ``fixed`` and ``ratefit`` requests, and
``suggested`` — the coupled answer the review shows (``hpa_sizing.autoscaler_hint`` →
``autoscaler.size_with_cpu_autoscaler``: the request that reserves the least CPU for the
load, within the curve's trained range and the per-pod capacity), for the policy's rate
and the replicas ``current`` runs, worked out again every ``suggest_every_s`` of simulated
time (it costs milliseconds each); a container without an answer keeps ratefit's request.

Scaling down waits for the autoscaler's stabilization window (``behavior.scaleDown.
stabilizationWindowSeconds``, default 300 s; ``controller.autoscaler.RecommendationWindow``).
Simplifications: no scaling-rate policies (the defaults allow doubling, or 4 pods, per
15 s up and everything down: at 5-minute passes they rarely bind), new pods ready at once,
usage from the models' demand curves (the measured usage came from the pods that really ran).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from ratefit.controller.autoscaler import RecommendationWindow, desired_replicas
from ratefit.controller.hpa_sizing import AutoscalerView, ModelFacts, autoscaler_hint

__all__ = ["SYNC_PERIOD_S", "AutoscaledFigures", "hpa_replicas", "pod_demand", "suggested_requests", "autoscaled_figures"]

#: the autoscaler's sync period (kube-controller-manager --horizontal-pod-autoscaler-sync-period default)
SYNC_PERIOD_S = 15.0
#: replicas tried when the autoscaler names no maxReplicas (autoscaling/v2 requires it; a bound for odd input)
NO_MAX_BOUND = 100


@dataclass(frozen=True)
class AutoscaledFigures:
    """One autoscaled workload's replicas and reserved CPU per strategy."""

    workload: str
    hpa: str
    utilization: float  # the autoscaler's target, percent
    min_replicas: int
    max_replicas: int
    containers: tuple[str, ...]  # the containers whose requests the autoscaler measures
    total_rate: np.ndarray  # req/s at each pass (NaN: no rate)
    #: strategy → replicas at each pass
    replicas: Mapping[str, np.ndarray] = field(default_factory=dict)
    #: strategy → the measured containers' request per pod at each pass, millicores
    request_m: Mapping[str, np.ndarray] = field(default_factory=dict)
    step_s: float = 300.0

    def reserved(self, strategy: str) -> np.ndarray:
        """Reserved cores at each pass: replicas × request."""
        return self.replicas[strategy] * self.request_m[strategy] / 1000.0

    def reserved_cpu_hours(self, strategy: str) -> float:
        return float(self.reserved(strategy).sum()) * self.step_s / 3600.0


def pod_demand(demand_at: Callable[[np.ndarray], np.ndarray], total_rate: np.ndarray,
               lo: int, hi: int) -> dict[int, np.ndarray]:
    """n → one pod's demand (cores) at each pass when n pods share ``total_rate``, for n in
    [lo, hi]. ``demand_at``: per-pod rates → cores (summed over the measured containers)."""
    out: dict[int, np.ndarray] = {}
    for n in range(max(1, lo), hi + 1):
        out[n] = np.asarray(demand_at(total_rate / n), dtype=float)
    return out


def hpa_replicas(view: AutoscalerView, demand: Mapping[int, np.ndarray], request_m: np.ndarray, *,
                 step_s: float, start: int | None = None) -> np.ndarray:
    """Replicas at each pass under ``view``'s CPU utilisation target with the pod request
    ``request_m`` in force (see the module doc): the count in force for the larger part of
    the pass (ties: the later count), the autoscaler syncing every 15 s from the pass's
    start. ``demand``: :func:`pod_demand`. A pass without a demand (no rate) keeps the
    count (the autoscaler has no metric: no recommendation). Scaling down waits for the
    stabilization window (``view.scale_down_window_s``, default 300 s): the count set is
    at most the highest recommendation of the window
    (``controller.autoscaler.RecommendationWindow``)."""
    assert view.cpu is not None
    lo = max(1, view.min_replicas)
    hi = view.max_replicas if view.max_replicas is not None else NO_MAX_BOUND
    n = min(max(start if start is not None else view.replicas, lo), hi)
    syncs = max(1, int(step_s // SYNC_PERIOD_S))
    window = RecommendationWindow(down_s=view.scale_down_window_s)
    out = np.zeros(len(request_m), dtype=np.int64)
    for i, req in enumerate(np.asarray(request_m, dtype=float).tolist()):
        held: dict[int, int] = {}  # count → syncs it was in force during this pass
        for j in range(syncs):
            d = demand[n][i] if n in demand else math.nan
            if not (math.isfinite(d) and req > 0):
                held[n] = held.pop(n, 0) + syncs - j
                break
            rec = desired_replicas(n, 100.0 * d / (req / 1000.0), view.cpu.utilization, tolerance=view.tolerance,
                                   min_replicas=lo, max_replicas=hi)
            if rec == n:
                # demand is constant within a pass: every later sync of it recommends n again;
                # the window needs only the last of those (it expires last)
                window.stabilize(i * step_s + (syncs - 1) * SYNC_PERIOD_S, n, n)
                held[n] = held.pop(n, 0) + syncs - j
                break
            n = window.stabilize(i * step_s + j * SYNC_PERIOD_S, n, rec)
            held[n] = held.pop(n, 0) + 1
        longest = max(held.values())
        out[i] = [k for k, v in held.items() if v == longest][-1]  # re-inserted on each update: last = latest
    return out


def suggested_requests(view: AutoscalerView, containers: Sequence[str], rates: Mapping[str, np.ndarray],
                       facts: Mapping[str, ModelFacts | None], current_m: Mapping[str, int | None],
                       replicas: np.ndarray, times: np.ndarray, *, every_s: float = 3600.0
                       ) -> dict[str, np.ndarray]:
    """Per container, the coupled answer's request (millicores; NaN: none) at each pass:
    ``hpa_sizing.autoscaler_hint`` — what the review suggests — at the policy's rate and
    ``replicas`` pods, worked out again every ``every_s`` of simulated time."""
    out = {c: np.full(len(times), np.nan) for c in containers}
    last_t = -math.inf
    got: dict[str, float] = {c: math.nan for c in containers}
    for i, t in enumerate(np.asarray(times, dtype=float).tolist()):
        if t - last_t >= every_s - 1e-6:
            last_t = t
            for c in containers:
                r = float(rates[c][i]) if c in rates else math.nan
                if not math.isfinite(r) or facts.get(c) is None:
                    got[c] = math.nan
                    continue
                v = AutoscalerView(hpa=view.hpa, replicas=int(replicas[i]), min_replicas=view.min_replicas,
                                   max_replicas=view.max_replicas, tolerance=view.tolerance, cpu=view.cpu)
                hint = autoscaler_hint(v, container=c, observed_rate=r, current_m=current_m.get(c), facts=facts[c])
                got[c] = math.nan if hint.coupled_m is None else float(hint.coupled_m)
        for c in containers:
            out[c][i] = got[c]
    return out


def autoscaled_figures(workload: str, view: AutoscalerView, *, containers: Sequence[str],
                       total_rate: np.ndarray, demand_at: Callable[[np.ndarray], np.ndarray],
                       requests_m: Mapping[str, Mapping[str, np.ndarray]], step_s: float) -> AutoscaledFigures:
    """The figures of one autoscaled workload. ``requests_m``: strategy → container →
    request in force at each pass (millicores); a strategy's pod request is the sum over
    ``containers``."""
    assert view.cpu is not None
    lo = max(1, view.min_replicas)
    hi = view.max_replicas if view.max_replicas is not None else NO_MAX_BOUND
    demand = pod_demand(demand_at, total_rate, lo, hi)
    replicas: dict[str, np.ndarray] = {}
    pod_req: dict[str, np.ndarray] = {}
    for s, per_c in requests_m.items():
        req = np.zeros(len(total_rate))
        for c in containers:
            req = req + np.nan_to_num(np.asarray(per_c[c], dtype=float), nan=0.0)
        pod_req[s] = req
        replicas[s] = hpa_replicas(view, demand, req, step_s=step_s)
    return AutoscaledFigures(workload=workload, hpa=view.hpa, utilization=view.cpu.utilization, min_replicas=lo,
                             max_replicas=hi, containers=tuple(containers), total_rate=total_rate,
                             replicas=replicas, request_m=pod_req, step_s=step_s)
