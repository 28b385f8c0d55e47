"""Sizing together with a horizontal autoscaler (issue 14), through real reconcile passes:
the sandbox API server holds Deployments and autoscaling/v2 HorizontalPodAutoscalers of
each metric type, a real ``ratefit serve`` answers (the closed-form curve of
``reconcile_fixtures.LINEAR``: demand = 0.05 + 0.004 × rate cores, upper band +0.02,
trained on 0…200 req/s per pod), the rates come from a replayed counter history.

References:
- Kubernetes docs, "Horizontal Pod Autoscaling", section "Algorithm details":
  desiredReplicas = ceil(currentReplicas × currentMetricValue / desiredMetricValue),
  no scaling while the ratio is within the tolerance of 1.0 (0.1 by default). The
  expected replica counts below are worked by hand from that formula (not computed
  with ratefit's ``desired_replicas``).
- autoscaling/v2 API reference (HorizontalPodAutoscalerSpec, MetricSpec, MetricTarget):
  the metric types Resource, Pods, Object, External; targets Utilization, AverageValue,
  Value; for Pods/Object/External an AverageValue target is the per-pod average.
- The CPU-utilisation case is checked against an independent brute force over replica
  counts (the same derivation as ``tests/test_autoscaler.py``): n pods carry total/n
  each; the least request on the 5m grid with demand(total/n) ≤ u × request.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import pytest

from api_fixtures import make_artifact, serve_process
from reconcile_fixtures import LINEAR, ceil5, deployment, policy, shared_sizing_api, world  # noqa: F401
from ratefit.models.store import ModelStore

BASE, SLOPE, BAND = LINEAR["base"], LINEAR["slope"], LINEAR["band"]
HEADROOM = 0.15  # reconcile_fixtures.policy's headroom


def demand(rate: float) -> float:
    return BASE + SLOPE * rate


def target_at(rate: float) -> int:
    """DESIGN.md "One decision": upper × (1 + headroom), rounded up to 5m."""
    return ceil5((demand(rate) + BAND) * (1 + HEADROOM) * 1000)


def metric(kind: str, name: str, target: dict[str, Any]) -> dict[str, Any]:
    """One autoscaling/v2 MetricSpec (API reference field names)."""
    if kind == "Resource":
        return {"type": "Resource", "resource": {"name": name, "target": target}}
    if kind == "Pods":
        return {"type": "Pods", "pods": {"metric": {"name": name}, "target": target}}
    if kind == "Object":
        return {"type": "Object", "object": {
            "metric": {"name": name},
            "describedObject": {"apiVersion": "networking.k8s.io/v1", "kind": "Ingress", "name": "main-route"},
            "target": target}}
    return {"type": "External", "external": {"metric": {"name": name}, "target": target}}


def avg(v: str) -> dict[str, str]:
    return {"type": "AverageValue", "averageValue": v}


def hpa(ns: str, target: str, metrics: list[dict[str, Any]], *, min_replicas: int = 1, max_replicas: int = 20,
        **spec: Any) -> dict[str, Any]:
    return {"apiVersion": "autoscaling/v2", "kind": "HorizontalPodAutoscaler",
            "metadata": {"name": target, "namespace": ns},
            "spec": {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment", "name": target},
                     "minReplicas": min_replicas, "maxReplicas": max_replicas, "metrics": metrics, **spec}}


def setup(name: str, *, replicas: int, request: str, metrics: list[dict[str, Any]], model: str = "shop/web/app",
          hpa_kw: dict[str, Any] | None = None, **policy_spec: Any) -> list[dict[str, Any]]:
    """A Deployment, its autoscaler and a SizingPolicy (apply mode) for it."""
    return [deployment("shop", name, [("app", request, None)], replicas=replicas),
            hpa("shop", name, metrics, **(hpa_kw or {})),
            policy("shop", name, workload=name, containers=[{"name": "app", "model": model}], **policy_spec)]


def rows_by_workload(result: Any) -> dict[str, Any]:
    return {row.workload: row for row in result.rows}


# -- every metric type in one pass -------------------------------------------------------------


def test_each_metric_type_in_one_real_pass(tmp_path: Path, shared_sizing_api: str) -> None:
    objects = (
        # Pods AverageValue 100 req/s, the only Pods metric, no name in the policy -> taken by default
        setup("pods", replicas=4, request="100m", metrics=[metric("Pods", "http_requests", avg("100"))])
        # Object AverageValue 80 (per pod: the API divides by the pod count), named by the policy
        + setup("object", replicas=4, request="100m", metrics=[metric("Object", "requests_per_second", avg("80"))],
                autoscalerRateMetric="requests_per_second")
        # External AverageValue 100, named; pods already carry 150 (more than T × 1.1)
        + setup("external", replicas=3, request="100m",
                metrics=[metric("External", "queue_rps", avg("100")), metric("Pods", "other", avg("5"))],
                autoscalerRateMetric="queue_rps")
        # several Pods metrics and no name: as before (sized at the observed rate)
        + setup("several", replicas=4, request="100m",
                metrics=[metric("Pods", "http_requests", avg("100")), metric("Pods", "grpc_requests", avg("40"))])
        # a name the autoscaler does not have: as before, and the message says so
        + setup("misnamed", replicas=4, request="100m", metrics=[metric("Pods", "http_requests", avg("100"))],
                autoscalerRateMetric="no_such_metric")
        # an Object metric with a Value target is a total, never a per-pod rate
        + setup("total", replicas=4, request="100m",
                metrics=[metric("Object", "requests_per_second", {"type": "Value", "value": "400"})],
                autoscalerRateMetric="requests_per_second")
        # CPU utilisation: held HorizontalConflict, with the coupled answer in the message
        + setup("cpu", replicas=4, request="250m",
                metrics=[metric("Resource", "cpu", {"type": "Utilization", "averageUtilization": 70})],
                hpa_kw={"max_replicas": 50})
    )
    rates = {("shop", n): [r] * k for n, r, k in [
        ("pods", 50.0, 4), ("object", 50.0, 4), ("external", 150.0, 3), ("several", 50.0, 4),
        ("misnamed", 50.0, 4), ("total", 50.0, 4), ("cpu", 44.0, 4)]}
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates=rates) as w:
        r = w.reconciler().run_pass()
        rows = rows_by_workload(r)

        # Pods: sized at T × (1 + 0.1) = 110 req/s, not at the observed 50
        pods = rows["pods"]
        assert pods.why == ("NewTarget",) and pods.proposed_m == target_at(110.0) == 590
        assert "sized for the autoscaler's target 100 req/s per pod" in pods.note
        assert "only Pods metric 'http_requests'" in pods.note and "autoscalerRateMetric unset" in pods.note
        assert w.cpu("shop", "pods", "app")[0] == "590m"

        # Object AverageValue, named: 80 × 1.1 = 88 req/s
        obj = rows["object"]
        assert obj.proposed_m == target_at(88.0) == 490
        assert "sized for the autoscaler's target 80 req/s per pod" in obj.note and "Object metric" in obj.note

        # External, named; the observed 150 is above 100 × 1.1: the observation decides
        ext = rows["external"]
        assert ext.proposed_m == target_at(150.0) == 775
        assert "sized for the observed 150 req/s per pod" in ext.note

        # no usable rate target: sized at the observed 50 req/s as without an autoscaler
        for name in ("several", "misnamed", "total"):
            assert rows[name].proposed_m == target_at(50.0) == 315, name
            assert "sized for" not in rows[name].note, name
        assert "several Pods metrics (grpc_requests, http_requests)" in rows["several"].note
        assert "no Pods/Object/External metric 'no_such_metric'" in rows["misnamed"].note
        assert "no Pods/Object/External metric 'requests_per_second'" in rows["total"].note

        # CPU utilisation 70 %: held; the message carries the coupled answer (brute force below)
        cpu = rows["cpu"]
        assert cpu.why == ("HorizontalConflict",)
        n, req_m, reserved = brute_force(total=cpu.rate * 4, u=0.70, hi=200.0)
        # 1 pod at 176 req/s: 0.754 cores = 0.7 x R -> R = 1.0771 -> 1080m. (The sizing API answers
        # whole millicores rounded up, so the controller's curve points err high by < 1m, i.e. R by
        # < 1.5m: the rates here keep the exact R at least 2.5m below its 5m step.)
        assert (n, req_m) == (1, 1080)
        assert f"request {req_m}m" in cpu.note and f"{n} replicas" in cpu.note
        # today's 250m: settles at (0.7 x 0.25 - 0.05) / 0.004 = 31.25 req/s per pod -> ceil(176/31.25) = 6 pods
        assert "today 250m: 6 replicas, 1.5 cores" in cpu.note
        assert w.cpu("shop", "cpu", "app") == ("250m", None)
        # cores per 100 req/s: now 4 x 0.25 / 176 x 100 = 0.568; suggested 1.08 / 176 x 100 = 0.614
        assert cpu.cores_per_100 == pytest.approx(100 / 176, rel=1e-4)
        assert cpu.cores_per_100_suggested == pytest.approx(reserved / (cpu.rate * 4) * 100)
        # in the JSON review as well
        assert cpu.as_dict()["cores_per_100_rps"] == pytest.approx(100 / 176, rel=1e-3)


def brute_force(*, total: float, u: float, hi: float, capacity: float | None = None) -> tuple[int, int, float]:
    """Independent derivation by replica count: n pods carry total/n each (within the trained
    range and the capacity); the least 5m request with demand(total/n) <= u x request."""
    top = min(hi, capacity) if capacity is not None else hi
    best: tuple[int, int, float] | None = None
    for n in range(1, 1000):
        per_pod = total / n
        if per_pod > top:
            continue
        req_m = ceil5(demand(per_pod) / u * 1000)
        reserved = n * req_m / 1000
        if best is None or reserved < best[2] - 1e-12:
            best = (n, req_m, reserved)
    assert best is not None
    return best


# -- the documented replica arithmetic, end to end ------------------------------------------------

# (current replicas, observed per-pod rate, AverageValue target T,
#  desired replicas worked by hand with the docs' formula, the working)
HPA_ALGORITHM_TABLE = [
    (4, 50.0, 100.0, 2, "ratio 0.5 -> ceil(4 x 0.5) = 2"),
    (4, 105.0, 100.0, 4, "ratio 1.05 within the 0.1 tolerance -> 4"),
    (3, 150.0, 100.0, 5, "ratio 1.5 -> ceil(3 x 1.5) = ceil(4.5) = 5"),
    (10, 91.0, 100.0, 10, "ratio 0.91 within the 0.1 tolerance -> 10"),
    (10, 85.0, 100.0, 9, "ratio 0.85 -> ceil(10 x 0.85) = ceil(8.5) = 9"),
    (6, 40.0, 50.0, 5, "ratio 0.8 -> ceil(6 x 0.8) = ceil(4.8) = 5"),
]


def test_replica_arithmetic_matches_the_documented_algorithm_end_to_end(tmp_path: Path, shared_sizing_api: str) -> None:
    """Kubernetes docs, "Horizontal Pod Autoscaling", "Algorithm details": the replicas the
    autoscaler runs at today's load price the suggested size (cores per 100 req/s), and
    the request covers the rate a pod may reach, T x (1 + 0.1), or the observed rate."""
    objects: list[dict[str, Any]] = []
    rates = {}
    for i, (n, rate, t, _, _) in enumerate(HPA_ALGORITHM_TABLE):
        name = f"row{i}"
        objects += setup(name, replicas=n, request="100m", metrics=[metric("Pods", "http_requests", avg(f"{t:g}"))],
                         mode="DryRun")
        rates[("shop", name)] = [rate] * n
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates=rates) as w:
        rows = rows_by_workload(w.reconciler().run_pass())
    for i, (n, rate, t, want, working) in enumerate(HPA_ALGORITHM_TABLE):
        row = rows[f"row{i}"]
        sizing_rate = max(rate, t * 1.1)
        assert row.verdict == "Proposed" and row.proposed_m == target_at(sizing_rate), working
        # the request covers the upper band at the rate the autoscaler lets a pod reach
        assert row.proposed_m / 1000 >= demand(sizing_rate) + BAND, working
        total = rate * n
        assert row.cores_per_100 == pytest.approx(0.1 * n / total * 100), working
        assert row.cores_per_100_suggested == pytest.approx(row.proposed_m / 1000 * want / total * 100), working


def test_hpa_tolerance_from_behavior_moves_the_sizing_rate(tmp_path: Path, shared_sizing_api: str) -> None:
    """Kubernetes 1.33+ ``behavior.scaleUp.tolerance`` (blog "Kubernetes v1.33:
    HorizontalPodAutoscaler Configurable Tolerance"): pods reach T x (1 + tolerance)."""
    objects = setup("tol", replicas=2, request="100m", metrics=[metric("Pods", "http_requests", avg("100"))],
                    hpa_kw={"behavior": {"scaleUp": {"tolerance": "0.3"}}}, mode="DryRun")
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "tol"): [20.0, 20.0]}) as w:
        row = rows_by_workload(w.reconciler().run_pass())["tol"]
    assert row.proposed_m == target_at(130.0)
    assert "pods reach 130 req/s within its 0.3 tolerance" in row.note


# -- CPU utilisation: allowHorizontalConflict applies the coupled answer; capacity caps it ---------------


def test_cpu_autoscaler_coupled_answer_is_applied_when_allowed(tmp_path: Path, shared_sizing_api: str) -> None:
    cpu_util = [metric("Resource", "cpu", {"type": "Utilization", "averageUtilization": 70})]
    objects = setup("coupled", replicas=4, request="250m", metrics=cpu_util, allowHorizontalConflict=True)
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "coupled"): [44.0] * 4}) as w:
        r = w.reconciler().run_pass()
        row = rows_by_workload(r)["coupled"]
        n, req_m, _ = brute_force(total=row.rate * 4, u=0.70, hi=200.0)
        assert row.why == ("NewTarget",) and row.proposed_m == req_m == 1080
        assert w.cpu("shop", "coupled", "app")[0] == "1080m"
        # the docs' formula then keeps that count: 1 pod at 176 req/s uses 0.754 cores of 1.08,
        # 69.8 % against the 70 % target, ratio 0.997 within the 0.1 tolerance
        usage = demand(176.0 / n) / (req_m / 1000) * 100
        assert abs(usage / 70 - 1) <= 0.1 and math.ceil(n * usage / 70) == n


def test_capacity_from_the_model_caps_the_per_pod_rate(tmp_path: Path) -> None:
    """The per-pod capacity recorded in the model (ratefit train --capacity) reaches the
    controller through GET /v1/models/{key}: the coupled answer keeps pods at or below
    it, and a rate target above it is called out."""
    store = ModelStore(tmp_path / "store")
    store.save(make_artifact("shop/cap/app", **LINEAR).with_capacity(100.0))
    cpu_util = [metric("Resource", "cpu", {"type": "Utilization", "averageUtilization": 70})]
    objects = (setup("capcpu", replicas=4, request="250m", metrics=cpu_util, model="shop/cap/app")
               + setup("caprate", replicas=4, request="100m", metrics=[metric("Pods", "http_requests", avg("100"))],
                       model="shop/cap/app", mode="DryRun"))
    with serve_process(tmp_path / "store", workdir=tmp_path) as api:
        rates = {("shop", "capcpu"): [46.0] * 4, ("shop", "caprate"): [50.0] * 4}
        with world(tmp_path, objects=objects, api_url=api.base_url, rates=rates) as w:
            assert w.sizing().model_detail("shop/cap/app")["capacity"] == 100.0
            rows = rows_by_workload(w.reconciler().run_pass())
    total = rows["capcpu"].rate * 4
    n, req_m, reserved = brute_force(total=total, u=0.70, hi=200.0, capacity=100.0)
    assert (n, req_m) == (2, 600)  # 2 pods at 92 req/s: 0.418 cores = 0.7 x R -> 597m -> 600m
    assert f"request {req_m}m" in rows["capcpu"].note and f"{n} replicas" in rows["capcpu"].note
    assert rows["capcpu"].cores_per_100_suggested == pytest.approx(reserved / total * 100)
    assert "above the measured per-pod capacity 100 req/s" in rows["caprate"].note


# -- the pure decision with an autoscaler view (no I/O) --------------------------------------------


def _view(**kw: Any) -> Any:
    from ratefit.controller.hpa_sizing import AutoscalerView, CpuTarget, RateTarget

    base = dict(hpa="parcels/label-printer", replicas=4, min_replicas=1, max_replicas=20, tolerance=0.1)
    if kw.pop("rate", False):
        base["rate_target"] = RateTarget(metric="http_requests", source="Pods", target=100.0, by_default=False)
    if kw.pop("cpu", False):
        base["cpu"] = CpuTarget(utilization=70.0)
    base.update(kw)
    return AutoscalerView(**base)  # type: ignore[arg-type]


def _decide(policy: Any, rate: float | None, *, view: Any = None, facts: Any = None, hpa_on_cpu: bool = False,
            replicas: int | None = 4) -> Any:
    from decide_fixtures import NOW
    from ratefit.controller.decide import ContainerInput, Sizing, decide_workload
    from ratefit.controller.policy import WorkloadHistory

    sizing = Sizing(demand=demand(rate or 0.0), upper=demand(rate or 0.0) + BAND)
    return decide_workload(policy, [ContainerInput("app", 100, None, rate, sizing, facts=facts)],
                           history=WorkloadHistory(), now=NOW, hpa_on_cpu=hpa_on_cpu, autoscaler=view,
                           replicas=replicas).decisions[0]


def test_pure_decision_reports_cores_per_100_without_an_autoscaler() -> None:
    from decide_fixtures import make_policy

    d = _decide(make_policy(), 50.0)
    # 4 pods x 0.1 core over 4 x 50 req/s: 0.2 cores per 100 req/s now; at the proposed request
    # (replicas unchanged without an autoscaler) proposed / 50 x 100
    assert d.cores_per_100_now == pytest.approx(0.2)
    assert d.cores_per_100_suggested == pytest.approx(d.proposed_m / 1000 / 50 * 100)
    assert _decide(make_policy(), 50.0, replicas=None).cores_per_100_now is None  # replicas unknown: not guessed


def test_pure_decision_without_a_rate_or_curve_points_says_so() -> None:
    from decide_fixtures import make_policy

    assert _decide(make_policy(), None, view=_view(rate=True)).why.value == "NoMetrics"
    d = _decide(make_policy(), 50.0, view=_view(cpu=True), hpa_on_cpu=True)
    assert d.why.value == "HorizontalConflict" and "no curve points" in d.message


def test_pure_decision_proposes_the_coupled_request_in_dry_run() -> None:
    from decide_fixtures import make_policy
    from ratefit.controller.hpa_sizing import ModelFacts, curve_grid

    grid = curve_grid(0.0, 200.0)
    facts = ModelFacts(rate_lo=0.0, rate_hi=200.0, rates=grid, demand=tuple(demand(r) for r in grid))
    p = make_policy(mode="DryRun", allowHorizontalConflict=True, stepLimit={"maxIncreasePercent": 1900, "maxDecreasePercent": 50})
    d = _decide(p, 44.0, view=_view(cpu=True), facts=facts, hpa_on_cpu=True)
    n, req_m, _ = brute_force(total=176.0, u=0.7, hi=200.0)
    assert d.verdict.value == "Proposed" and d.proposed_m == req_m == 1080 and f"{n} replicas" in d.message
    # today's 100m settles at (0.07 - 0.05) / 0.004 = 5 req/s per pod: ceil(176 / 5) = 36 pods > maxReplicas 20
    assert "today 100m has no settling point with pods within [0, 200] req/s, at most 20 replicas" in d.message
