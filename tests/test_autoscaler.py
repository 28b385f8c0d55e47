"""Horizontal autoscaler arithmetic and the sizings built on it (controller/autoscaler.py).

Reference: Kubernetes docs, "Horizontal Pod Autoscaling", section "Algorithm
details": desiredReplicas = ceil(currentReplicas × currentMetricValue /
desiredMetricValue), no scaling while the ratio is within the tolerance of 1.0
(0.1 by default). Worked examples beside each row name where they come from.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from ratefit.controller.autoscaler import (
    coupled_size,
    cores_per_100_rps,
    desired_replicas,
    settle_rate,
    size_for_rate_target,
    size_with_cpu_autoscaler,
)
from ratefit.models.curve import DemandCurve
from ratefit.models.errors import InputError

# (current replicas, current metric, target metric, tolerance overrides, expected, source)
HPA_TABLE = [
    # Kubernetes docs, "Algorithm details" (from memory): current 200m, desired 100m -> doubled
    (3, 200.0, 100.0, {}, 6, "docs: 200m/100m doubles"),
    # same page (from memory): current 50m, desired 100m -> halved
    (4, 50.0, 100.0, {}, 2, "docs: 50m/100m halves"),
    # Kubernetes blog "v1.33: HorizontalPodAutoscaler Configurable Tolerance": 50 replicas,
    # 90% utilisation, target 75% -> 60 replicas (ratio 1.2 is outside the 10% tolerance)
    (50, 90.0, 75.0, {}, 60, "blog v1.33: 50 x 90/75 = 60"),
    # within the default tolerance 0.1 (docs): no change either way
    (10, 108.0, 100.0, {}, 10, "docs: ratio 1.08 within 0.1"),
    (10, 91.0, 100.0, {}, 10, "docs: ratio 0.91 within 0.1"),
    (10, 110.0, 100.0, {}, 10, "docs: ratio 1.10 at the tolerance edge"),
    # just outside it: ceil(10 x 1.11) = ceil(11.1) = 12
    (10, 111.0, 100.0, {}, 12, "docs formula: ceil(11.1)"),
    (10, 85.0, 100.0, {}, 9, "docs formula: ceil(8.5)"),
    # blog v1.33 example behaviour: scaleUp tolerance 0, scaleDown tolerance 0.05
    (50, 76.0, 75.0, {"scale_up_tolerance": 0.0, "scale_down_tolerance": 0.05}, 51, "blog v1.33: up tolerance 0"),
    (50, 72.0, 75.0, {"scale_up_tolerance": 0.0, "scale_down_tolerance": 0.05}, 50, "blog v1.33: 0.96 within 0.05"),
    (50, 70.0, 75.0, {"scale_up_tolerance": 0.0, "scale_down_tolerance": 0.05}, 47, "formula: ceil(46.67)"),
]


@pytest.mark.parametrize("n,cur,tgt,kw,want,source", HPA_TABLE, ids=[row[-1] for row in HPA_TABLE])
def test_desired_replicas_follows_the_documented_algorithm(n, cur, tgt, kw, want, source) -> None:
    assert desired_replicas(n, cur, tgt, **kw) == want, source


def test_desired_replicas_clamps_and_refuses_bad_input() -> None:
    assert desired_replicas(10, 300.0, 100.0, max_replicas=20) == 20
    assert desired_replicas(10, 10.0, 100.0, min_replicas=3) == 3
    with pytest.raises(InputError, match="target metric value"):
        desired_replicas(3, 50.0, 0.0)
    with pytest.raises(InputError, match="whole number"):
        desired_replicas(-1, 50.0, 10.0)


def test_rate_target_sizes_for_what_the_autoscaler_lets_a_pod_reach() -> None:
    # a Pods metric with AverageValue 40 req/s: pods drift to 40 x 1.1 = 44 req/s before a pod is added
    s = size_for_rate_target(25.0, 40.0)
    assert s.sizing_rate == pytest.approx(44.0) and s.by_target
    assert "sized for the autoscaler's target 40 req/s per pod" in s.message
    # observed above the target (the autoscaler is at maxReplicas): the observation decides
    s = size_for_rate_target(60.0, 40.0)
    assert s.sizing_rate == 60.0 and not s.by_target
    # a target the pods cannot carry within the SLO is called out
    s = size_for_rate_target(25.0, 40.0, capacity=42.0)
    assert s.over_capacity and "capacity 42" in s.message
    with pytest.raises(InputError):
        size_for_rate_target(25.0, 0.0)


# A linear demand curve: idle 0.05 cores + 4 ms of CPU per request (Utilization Law,
# U = U0 + X·S). Values invented for the arithmetic.
IDLE, S = 0.05, 0.004


def linear(r: float) -> float:
    return IDLE + S * r


def brute_force_by_replicas(total: float, u: float, hi: float, step: float = 0.005) -> tuple[int, float, float]:
    """Independent derivation, by replica count instead of by request: n replicas carry
    total/n each, which must lie within the range; the least request on the grid that
    lets the autoscaler settle there is demand(total/n)/u rounded up; keep the cheapest."""
    best = None
    for n in range(1, 10_000):
        r = total / n
        if r > hi:
            continue
        req = math.ceil(linear(r) / u / step - 1e-9) * step
        reserved = n * req
        if best is None or reserved < best[2] - 1e-12:
            best = (n, req, reserved)
        if r < 1:
            break
    assert best is not None
    return best


def test_settle_rate_solves_demand_equals_u_times_request() -> None:
    # 0.7 x 1.0 core = 0.7 cores = 0.05 + 0.004 r  ->  r = 162.5 req/s
    assert settle_rate(linear, 1.0, 0.7, 0.0, 200.0) == pytest.approx(162.5, rel=1e-6)
    assert settle_rate(linear, 0.05, 0.7, 10.0, 200.0) is None  # even the lowest rate needs more
    assert settle_rate(linear, 5.0, 0.7, 0.0, 200.0) is None  # would settle above the trained range


def test_cpu_autoscaler_sizing_matches_a_hand_computation() -> None:
    # 1000 req/s at 70 %, per-pod rates up to 200 req/s: fewest pods = 5 at 200 req/s each,
    # demand 0.05 + 0.004 x 200 = 0.85 cores = 0.7 R -> R = 1.2143, 1.215 on the 5m grid
    # (settles at r = 200.1, so ceil(1000/200.1) = 5 replicas), reserving 5 x 1.215 = 6.075 cores.
    # 6 replicas would need R >= (0.05 + 0.004 x 166.7)/0.7 = 1.025 -> 6.15 cores: more.
    res = size_with_cpu_autoscaler(linear, total_rate=1000.0, target_utilization_percent=70, rate_range=(0.0, 200.0))
    assert res.best is not None
    assert res.best.replicas == 5
    assert res.best.request == pytest.approx(1.215)
    assert res.best.reserved == pytest.approx(6.075)
    assert res.best.cores_per_100_rps == pytest.approx(0.6075)
    # and the autoscaler itself (docs formula) keeps 5 replicas there: 0.85/1.215 = 69.96 % vs 70 %
    assert desired_replicas(5, 100 * linear(200.0) / 1.215, 70) == 5
    n, req, reserved = brute_force_by_replicas(1000.0, 0.7, 200.0)
    assert (res.best.replicas, res.best.request, res.best.reserved) == (n, pytest.approx(req), pytest.approx(reserved))


@pytest.mark.parametrize("total,u,hi", [(1000.0, 70, 200.0), (333.0, 50, 120.0), (4321.0, 85, 300.0), (80.0, 60, 50.0)])
def test_cpu_autoscaler_sizing_agrees_with_the_brute_force(total, u, hi) -> None:
    res = size_with_cpu_autoscaler(linear, total_rate=total, target_utilization_percent=u, rate_range=(0.0, hi))
    n, req, reserved = brute_force_by_replicas(total, u / 100, hi)
    assert res.best is not None
    assert res.best.reserved == pytest.approx(reserved)
    assert res.best.replicas == n


def test_capacity_caps_the_per_pod_rate_and_today_is_reported() -> None:
    free = size_with_cpu_autoscaler(linear, total_rate=1000.0, target_utilization_percent=70, rate_range=(0.0, 200.0))
    capped = size_with_cpu_autoscaler(
        linear, total_rate=1000.0, target_utilization_percent=70, rate_range=(0.0, 200.0),
        capacity=100.0, current_request=0.5,
    )
    assert capped.best is not None and free.best is not None
    assert capped.best.per_pod_rate <= 100.0 + 1e-9
    assert capped.best.replicas >= 10 and capped.best.reserved >= free.best.reserved
    # today: 0.5 core settles at (0.35 - 0.05)/0.004 = 75 req/s -> ceil(1000/75) = 14 replicas, 7 cores
    assert capped.current is not None
    assert capped.current.replicas == 14 and capped.current.reserved == pytest.approx(7.0)
    assert "today 500m: 14 replicas" in capped.message


def test_works_on_a_trained_demand_curve() -> None:
    grid = np.linspace(0.0, 200.0, 101)
    curve = DemandCurve(rate_lo=0.0, rate_hi=200.0, cpu=[linear(r) for r in grid], band=0.02)
    res = size_with_cpu_autoscaler(curve, total_rate=1000.0, target_utilization_percent=70)
    assert res.best is not None and res.best.replicas == 5 and res.best.request == pytest.approx(1.215)
    assert res.rate_range == (0.0, 200.0)
    # sizing on the upper band needs more per pod
    banded = size_with_cpu_autoscaler(curve, total_rate=1000.0, target_utilization_percent=70, bound=True)
    assert banded.best is not None and banded.best.reserved > res.best.reserved
    one = coupled_size(lambda r: curve.lookup_one(r)[0], 1.0,
                       total_rate=1000.0, utilization=0.7, lo=0.0, hi=200.0)
    assert one is not None and one.settle_rate == pytest.approx(162.5, rel=1e-4) and one.replicas == 7


def test_no_settling_point_says_so_and_bad_input_is_refused() -> None:
    res = size_with_cpu_autoscaler(linear, total_rate=100.0, target_utilization_percent=70,
                                   rate_range=(0.0, 200.0), candidates=[0.01, 0.02])
    assert res.best is None and "no request settles" in res.message
    with pytest.raises(InputError, match="rate_range"):
        size_with_cpu_autoscaler(linear, total_rate=100.0, target_utilization_percent=70)
    with pytest.raises(InputError):
        size_with_cpu_autoscaler(linear, total_rate=100.0, target_utilization_percent=0, rate_range=(0, 10))
    assert math.isnan(cores_per_100_rps(1.0, 0.0))
