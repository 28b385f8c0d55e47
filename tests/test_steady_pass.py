"""The steady-state memo (controller/stages/steady.py) changes nothing a pass does.

Two identical worlds (each its own sandbox API server with the same objects, the same
replayed rate history, the shared real ``ratefit serve``) are driven through the same
sequence of passes and outside changes, with the same injected clocks and budget: one
reconciler reuses unchanged policies' decisions, rows and status verdicts, the other
decides every policy every pass. After every pass both must have the same review
rows, status writes, Events and patches, and the cluster must hold the same statuses
and CPU requests. The sequence covers fixed points (reused), the budget running out
and refilling (BudgetSpent, read by the decision), a decrease settling with the clock
(Settling), a cooldown (CoolingDown), a rate change, a spec edit, an edit of the
workload by someone else, an invalid policy and a policy whose workload is missing.

INVENTED test scenario (namespace ``shop``; the curves of tests/reconcile_fixtures.LINEAR).
Kubernetes semantics relied on: every write of an object, its status included, gives
it a new ``metadata.resourceVersion`` (Kubernetes API concepts, "Resource versions").
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import replace
from datetime import datetime, timedelta, timezone
from typing import Any

import httpx

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import deployment, policy, shared_sizing_api, world  # noqa: F401
from ratefit.controller.limits import Budget, TokenBucket
from ratefit.controller.reconcile import PassOutcome, ReconcileConfig, Reconciler

NAMES = ("a", "b", "c", "api")


def _objects() -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = [
        # apply mode, a decrease settles for 5 minutes; 10 minutes of cooldown after a change
        deployment("shop", "a", [("app", "100m", None)]),
        policy("shop", "a", workload="a", containers=[{"name": "app", "model": "shop/a/app"}],
               settle="5m", cooldown="10m"),
        # dry-run: proposes a decrease (a fixed point once its status says so)
        deployment("shop", "b", [("app", "1000m", "2000m")]),
        policy("shop", "b", workload="b", mode="DryRun", containers=[{"name": "app", "model": "shop/b/app"}]),
        deployment("shop", "c", [("app", "100m", None)]),
        policy("shop", "c", workload="c", containers=[{"name": "app", "model": "shop/c/app"}]),
        # two containers, one with a model the sizing API does not have (NoModel)
        deployment("shop", "web", [("app", "100m", None), ("other", "50m", None)]),
        policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"},
                                                           {"name": "other", "model": "shop/web/other"}]),
        deployment("shop", "api", [("app", "300m", None)]),
        policy("shop", "api", workload="api", containers=[{"name": "app", "model": "shop/api/app"}]),
        # invalid (floor above ceiling) and a workload that does not exist
        policy("shop", "bad", workload="c", containers=[{"name": "app", "model": "shop/c/app",
                                                          "floor": "300m", "ceiling": "200m"}]),
        policy("shop", "ghost", workload="nowhere", containers=[{"name": "app", "model": "shop/a/app"}]),
    ]
    return out


class OverriddenRates:
    """The real replay rate source, with some containers' rates replaced (the test's
    outside change of load; everything else is the replayed history)."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.override: dict[str, float] = {}

    def per_pod_rates(self, requests: Any) -> Any:
        got = dict(self.inner.per_pod_rates(requests))
        for key, rate in self.override.items():
            if key in got:
                got[key] = replace(got[key], rate=rate)
        return got


class Clock:
    def __init__(self) -> None:
        self.wall = datetime(2026, 12, 2, 6, 0, tzinfo=timezone.utc)
        self.mono = 0.0

    def tick(self, seconds: float) -> None:
        self.wall += timedelta(seconds=seconds)
        self.mono += seconds


def _patch(w: Any, path: str, body: dict[str, Any], kind: str = "merge") -> None:
    r = httpx.patch(w.sandbox.url + path, json=body, headers={"Content-Type": f"application/{kind}-patch+json"},
                    timeout=10.0)
    r.raise_for_status()


def _cluster(w: Any) -> dict[str, Any]:
    """What the controller wrote, without what the API server stamps itself."""
    statuses = {o["metadata"]["name"]: o.get("status")
                for o in w.get("/apis/ratefit.dev/v1alpha1/namespaces/shop/sizingpolicies")["items"]}
    cpu = {}
    for o in w.get("/apis/apps/v1/namespaces/shop/deployments")["items"]:
        for c in o["spec"]["template"]["spec"]["containers"]:
            cpu[f"{o['metadata']['name']}/{c['name']}"] = c.get("resources")
    events = sorted((e["reason"], e["regarding"]["kind"], e["regarding"]["name"], e.get("note", ""))
                    for e in w.events("shop"))
    return {"status": statuses, "cpu": cpu, "events": events}


def test_reusing_unchanged_policies_changes_no_decision_status_or_write(tmp_path, shared_sizing_api) -> None:
    rates = {("shop", n): [50.0] for n in NAMES} | {("shop", "web"): [20.0]}
    with contextlib.ExitStack() as stack:
        end = float(int(time.time() - 120))
        for name in ("memo", "plain"):
            (tmp_path / name).mkdir()
        worlds = [stack.enter_context(world(tmp_path / name, objects=_objects(), api_url=shared_sizing_api,
                                           rates=rates, end=end)) for name in ("memo", "plain")]
        clock = Clock()
        sources = [OverriddenRates(w.rates()) for w in worlds]
        recs = [Reconciler(kube=w.kube(), rates=src, sizing=w.sizing(), config=ReconcileConfig(reuse_unchanged=reuse),
                           budget=Budget(bucket=TokenBucket.per_minute(1, now=0.0)),
                           wall_clock=lambda: clock.wall, monotonic=lambda: clock.mono)
                for w, src, reuse in zip(worlds, sources, (True, False))]
        memo = recs[0].memo
        assert memo is not None and recs[1].memo is None

        def outside(change) -> None:  # the same outside change in both worlds
            for w, src in zip(worlds, sources):
                change(w, src)

        steps: list[tuple[str, Any]] = [
            ("first pass", None), ("budget refills", None), ("budget refills", None), ("nothing changed", None),
            ("nothing changed", None),
            ("load of a drops: settling", lambda w, s: s.override.update({"shop/a/app": 5.0})),
            ("still settling", None), ("still settling", None), ("settled: decrease", None),
            ("nothing changed", None), ("nothing changed", None),
            ("spec of c edited", lambda w, s: _patch(w, "/apis/ratefit.dev/v1alpha1/namespaces/shop/sizingpolicies/c",
                                                    {"spec": {"headroomPercent": 60}})),
            ("nothing changed", None),
            ("api edited by someone else", lambda w, s: _patch(w, "/apis/apps/v1/namespaces/shop/deployments/api", {
                "spec": {"template": {"spec": {"containers": [{"name": "app", "resources": {
                    "requests": {"cpu": "2"}}}]}}}}, "strategic-merge")),
            ("cooling down", None), ("nothing changed", None),
            ("load of api rises", lambda w, s: s.override.update({"shop/api/app": 400.0})),
            ("nothing changed", None), ("nothing changed", None),
        ]
        reused: list[int] = []
        seen_whys: set[str] = set()
        for label, change in steps:
            if change is not None:
                outside(change)
            results = [rec.run_pass() for rec in recs]
            a, b = results
            assert a.outcome is b.outcome and a.outcome in (PassOutcome.DONE, PassOutcome.DEGRADED), (label, a.errors)
            assert [r.as_dict() for r in a.rows] == [r.as_dict() for r in b.rows], label
            assert (a.status_writes, a.events, a.patched, a.invalid, a.policies) == \
                (b.status_writes, b.events, b.patched, b.invalid, b.policies), label
            assert _cluster(worlds[0]) == _cluster(worlds[1]), label
            reused.append(memo.reused)
            seen_whys.update(r.why[0] for r in a.rows)
            clock.tick(150.0)  # 2.5 minutes per pass
        # the sequence did what it is meant to cover
        assert {"BudgetSpent", "Settling", "CoolingDown", "PolicyInvalid", "WorkloadNotFound", "NoModel"} <= seen_whys
        # and the memo was used: quiet passes reuse most policies, changed ones are decided again
        assert reused[0] == 0
        assert max(reused) >= 5, reused
        assert sum(reused) >= 40, reused


class CountingSizing:
    """The real sizing client, counting the items each demand batch sends."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.sent: list[int] = []

    def demand_batch(self, items: Any) -> Any:
        self.sent.append(len(items))
        return self.inner.demand_batch(items)

    def health(self) -> Any:
        return self.inner.health()


def test_sizing_answers_are_reused_until_the_store_version_changes(tmp_path) -> None:
    from api_fixtures import make_artifact
    from ratefit.models.store import ModelStore

    objects = [deployment("shop", "a", [("app", "100m", None)]),
               policy("shop", "a", workload="a", mode="DryRun", containers=[{"name": "app", "model": "shop/a/app"}]),
               deployment("shop", "b", [("app", "100m", None)]),
               policy("shop", "b", workload="b", mode="DryRun", containers=[{"name": "app", "model": "shop/b/app"}])]
    models = {"shop/a/app": {"base": 0.05, "slope": 0.004}, "shop/b/app": {"base": 0.05, "slope": 0.004}}
    with world(tmp_path, objects=objects, models=models, rates={("shop", "a"): [50.0], ("shop", "b"): [20.0]}) as w:
        sizing = CountingSizing(w.sizing())
        rec = Reconciler(kube=w.kube(), rates=w.rates(), sizing=sizing, config=ReconcileConfig())
        first = rec.run_pass()
        assert sizing.sent == [2]
        second = rec.run_pass()
        assert sizing.sent == [2]  # same models, same rates, same store version: nothing asked
        assert [r.as_dict() for r in second.rows] == [r.as_dict() for r in first.rows]
        # a retrained model (a steeper curve) and a reload: a new store version, asked again
        ModelStore(tmp_path / "store").save(make_artifact("shop/a/app", base=0.05, slope=0.008))
        sizing.inner.reload()
        third = rec.run_pass()
        assert sizing.sent == [2, 2]
        by = {r.policy: r for r in third.rows}
        # Utilization Law (U = X·S): twice the CPU per request, more demand at the same rate
        assert by["a"].demand_m > {r.policy: r for r in first.rows}["a"].demand_m
        assert by["b"].demand_m == {r.policy: r for r in first.rows}["b"].demand_m


def test_the_memo_key_changes_with_every_observed_input() -> None:
    """Every field of an observation is part of the memo's key: one changed value (or a new
    resourceVersion of the policy or the workload) means the policy is decided again."""
    from dataclasses import fields

    from ratefit.controller.decide import ContainerInput, Sizing
    from ratefit.controller.stages.observe import Observed
    from ratefit.controller.stages.steady import inputs_key
    from ratefit.controller.workload import ContainerResources, PolicyObject, Workload, WorkloadKind

    obj = PolicyObject(namespace="shop", name="web", uid="u1", generation=1, resource_version="10", spec={}, status={})
    w = Workload(namespace="shop", kind=WorkloadKind.DEPLOYMENT, name="web", uid="w1", generation=1,
                 resource_version="20", replicas=2, selector="app=web", annotations={},
                 containers=(ContainerResources("app", 100, None),), rollout_in_progress=False)
    inp = ContainerInput(name="app", request_m=100, limit_m=None, rate=50.0, sizing=Sizing(0.25, 0.27))
    o = Observed(obj=obj, workload=w, inputs=(inp,))
    key = inputs_key(o)
    assert key is not None and inputs_key(replace(o)) == key
    changed = [
        replace(o, obj=replace(obj, resource_version="11")),  # a status or spec write
        replace(o, workload=replace(w, resource_version="21")),  # the workload edited
        replace(o, inputs=(replace(inp, rate=50.5),)),
        replace(o, inputs=(replace(inp, sizing=Sizing(0.25, 0.28)),)),
        replace(o, inputs=(replace(inp, request_m=105),)),
        replace(o, hpa_on_cpu=True),
        replace(o, conflict_with="shop/older"),
        replace(o, problem="gone"),
    ]
    for other in changed:
        assert inputs_key(other) != key, other
    # not comparable: unobserved, or objects without a resourceVersion
    assert inputs_key(replace(o, unavailable=True)) is None
    assert inputs_key(replace(o, obj=replace(obj, resource_version=""))) is None
    # every field of Observed is in the key, by value or by resourceVersion
    from ratefit.controller.stages import steady

    assert set(steady._BY_VALUE) | steady._BY_VERSION == {f.name for f in fields(Observed)}
