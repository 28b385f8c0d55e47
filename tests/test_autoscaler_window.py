"""The horizontal autoscaler's scale-down stabilization window, as the replay simulates it.

External checks, named beside each:
- the worked example of KEP-853 "Configurable scale velocity for HPA" (kubernetes/
  enhancements, keps/sig-autoscaling/853-configurable-hpa-scale-velocity, "Algorithm
  pseudocode", mode 1 "Stabilization before scaling down"): a 600-s window, one
  recommendation a minute, from 10 replicas;
- the autoscaling/v2 API reference, HPAScalingRules.stabilizationWindowSeconds: "If not
  set, use the default values: For scale up: 0 (i.e. no stabilization is done). For scale
  down: 300"; allowed 0 to 3600;
- the autoscaler's rule, Kubernetes docs "Horizontal Pod Autoscaling", algorithm details
  (desiredReplicas = ceil(currentReplicas × current / desired), tolerance 0.1), and the
  Utilization Law U = X·S (Denning & Buzen 1978) for a pod's CPU, as in
  tests/test_replay_autoscaler.py.

The small examples are invented.
"""

from __future__ import annotations

import numpy as np
import pytest

from ratefit.controller.autoscaler import DEFAULT_SCALE_DOWN_WINDOW_S, RecommendationWindow
from ratefit.controller.hpa_sizing import AutoscalerView, CpuTarget, autoscaler_view
from ratefit.controller.kube import hpa_from_json
from ratefit.controller.replay.replicas import hpa_replicas, pod_demand
from ratefit.models.errors import InputError


def test_the_keps_worked_example() -> None:
    """KEP-853, mode 1: window 600 s, a recommendation each minute, 10 replicas. The first
    ten recommendations [10, 9, 8, 9, 9, 8, 9, 8, 9, 8] leave 10 (the largest of the window
    is 10); the eleventh, 7, pushes the first out: the largest is 9, 10 → 9. (The KEP's
    example also limits the pace to 5 pods a minute, which does not bind here.)"""
    w = RecommendationWindow(down_s=600.0)
    n = 10
    for minute, rec in enumerate([10, 9, 8, 9, 9, 8, 9, 8, 9, 8], start=1):
        n = w.stabilize(60.0 * minute, n, rec)
        assert n == 10, minute
    assert w.stabilize(60.0 * 11, n, 7) == 9


def test_scaling_up_is_at_once_and_a_zero_window_follows_every_recommendation() -> None:
    # the API reference: scale up has no stabilization by default
    w = RecommendationWindow()
    assert w.stabilize(0.0, 4, 2) == 2  # nothing remembered yet: nothing to hold the count up
    assert w.stabilize(15.0, 2, 7) == 7
    assert w.stabilize(30.0, 7, 3) == 7  # 7 was recommended 15 s ago: not yet
    zero = RecommendationWindow(down_s=0.0)
    assert [zero.stabilize(15.0 * k, n, r) for k, (n, r) in enumerate([(4, 2), (2, 7), (7, 3)])] == [2, 7, 3]


def test_the_count_falls_when_the_last_higher_recommendation_leaves_the_window() -> None:
    w = RecommendationWindow(down_s=300.0)
    n = w.stabilize(0.0, 5, 5)
    for t in range(15, 300, 15):  # every later recommendation is 2
        n = w.stabilize(float(t), n, 2)
        assert n == 5, t
    assert w.stabilize(300.0, n, 2) == 2  # 0.0 is not after 300 - 300: out of the window


def test_windows_outside_the_api_range_are_refused() -> None:
    with pytest.raises(InputError, match="at most 3600"):
        RecommendationWindow(down_s=3601.0)
    with pytest.raises(InputError, match="non-negative"):
        RecommendationWindow(down_s=-1.0)


def _hpa(behavior: dict | None = None) -> dict:
    spec = {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment", "name": "web"},
            "minReplicas": 1, "maxReplicas": 6,
            "metrics": [{"type": "Resource", "resource": {"name": "cpu",
                                                          "target": {"type": "Utilization", "averageUtilization": 60}}}]}
    if behavior is not None:
        spec["behavior"] = behavior
    return {"apiVersion": "autoscaling/v2", "kind": "HorizontalPodAutoscaler",
            "metadata": {"namespace": "shop", "name": "web"}, "spec": spec}


@pytest.mark.parametrize("behavior, window", [
    (None, 300.0),  # API reference: scale down defaults to 300 s
    ({"scaleDown": {"stabilizationWindowSeconds": 60}}, 60.0),
    ({"scaleDown": {"stabilizationWindowSeconds": 0}}, 0.0),
    ({"scaleUp": {"stabilizationWindowSeconds": 120}}, 300.0),  # scale up's window is not scale down's
    ({"scaleDown": {"stabilizationWindowSeconds": 7200}}, 300.0),  # outside 0..3600: the API refuses it; default
])
def test_the_window_is_read_from_the_autoscalers_behavior(behavior, window) -> None:
    h = hpa_from_json(_hpa(behavior))
    assert h.scale_down_window_s == window
    assert autoscaler_view([h], metric_name=None, workload_replicas=2).scale_down_window_s == window
    assert DEFAULT_SCALE_DOWN_WINDOW_S == 300.0


def _view(window: float) -> AutoscalerView:
    return AutoscalerView(hpa="ns/w", replicas=2, min_replicas=1, max_replicas=6, tolerance=0.1,
                          cpu=CpuTarget(utilization=60.0), scale_down_window_s=window)


def test_the_replayed_count_waits_for_the_window_before_falling() -> None:
    """S = 1 ms a request (U = X·S), 60 % of 500m, 1-6 replicas, 5-minute passes, 15-s syncs.
    By hand (the docs' rule, per sync): pass 0 (900 req/s) 2 → 3; pass 1 (950) stays 3;
    pass 2 (3000) → 6 at its first sync (scaling up is immediate); from pass 3 (120 req/s)
    every recommendation is 1 (6 pods at 20 req/s = 4 %).
    - window 0: the count is 1 from pass 3's first sync;
    - window 300 s: the last recommendation of 6 was at pass 2's last sync (t = 885 s); it
      leaves the window at t = 1185 s, pass 3's last sync: 6 held 19 of pass 3's 20 syncs,
      so pass 3 shows 6 and pass 4 shows 1;
    - window 900 s: 6 stays until t = 1785 s, pass 5's last sync: passes 3-5 show 6."""
    total = np.array([900.0, 950.0, 3000.0, 120.0, 120.0, 120.0, 120.0])
    demand = pod_demand(lambda x: x * 0.001, total, 1, 6)
    req = np.full(len(total), 500.0)
    assert hpa_replicas(_view(0.0), demand, req, step_s=300.0).tolist() == [3, 3, 6, 1, 1, 1, 1]
    assert hpa_replicas(_view(300.0), demand, req, step_s=300.0).tolist() == [3, 3, 6, 6, 1, 1, 1]
    assert hpa_replicas(_view(900.0), demand, req, step_s=300.0).tolist() == [3, 3, 6, 6, 6, 6, 1]


def test_a_brief_dip_inside_the_window_keeps_the_count() -> None:
    """A dip of one pass (5 min) under a 10-minute window: the count does not move at all
    (the flapping the window exists to prevent), where a zero window drops and re-adds pods."""
    total = np.array([3000.0, 120.0, 3000.0, 3000.0])
    demand = pod_demand(lambda x: x * 0.001, total, 1, 6)
    req = np.full(len(total), 500.0)
    assert hpa_replicas(_view(600.0), demand, req, step_s=300.0).tolist() == [6, 6, 6, 6]
    assert hpa_replicas(_view(0.0), demand, req, step_s=300.0).tolist() == [6, 1, 6, 6]
