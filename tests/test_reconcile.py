"""One reconcile pass against real parts: the sandbox API server (through the official
client), a real `ratefit serve`, rates replayed from an OpenMetrics history.

Expected values are computed here from the closed-form curves, independently of
controller/decide: demand = base + slope × rate cores, upper = demand + band (the
artifact's curve, tests/api_fixtures.make_artifact), target = ceil5(upper × (1 + headroom))
clamped to [floor, ceiling] (DESIGN.md "One decision", step 3); keep-ratio scales the
limit by the same factor (step 8). Quantities are compared after parsing with
controller/quantity (checked against kubernetes.utils.parse_quantity in test_quantity.py).
"""

from __future__ import annotations

import json
import math

import pytest

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, ceil5, deployment, hpa, policy, world
from ratefit.controller.limits import Budget, TokenBucket
from ratefit.controller.quantity import parse_cpu
from ratefit.controller.reconcile import PassOutcome

BASE, SLOPE, BAND = 0.05, 0.004, 0.02


def upper_m(rate: float) -> int:
    return math.ceil(round((BASE + SLOPE * rate + BAND) * 1000, 6))


def target_m(rate: float, headroom: float = 0.15) -> int:
    return ceil5(upper_m(rate) * (1 + headroom))


def _m(q: str | None) -> int | None:
    return None if q is None else parse_cpu(q)



def test_apply_patches_the_changed_container_and_a_second_pass_does_nothing(tmp_path, shared_sizing_api) -> None:
    objects = [
        deployment("shop", "web", [("app", "100m", "200m"), ("sidecar", "50m", None)]),
        policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}]),
    ]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [40.0, 50.0]}) as w:
        rec = w.reconciler()
        r1 = rec.run_pass()
        assert r1.outcome is PassOutcome.DONE, r1.errors
        want = target_m(50.0)  # the busiest pod decides: 50 req/s → upper 270m → 315m
        assert want == 315
        assert r1.patched == ("shop/Deployment/web",)
        req, lim = w.cpu("shop", "web", "app")
        assert _m(req) == want
        assert _m(lim) == math.ceil(200 * want / 100)  # keep-ratio: limit/request stays 2
        assert w.cpu("shop", "web", "sidecar") == ("50m", None)  # the other container is untouched
        obj = w.workload("shop", "web")
        prev = json.loads(obj["metadata"]["annotations"]["ratefit.dev/previous-requests"])
        assert prev == {"app": {"cpu_request": "100m", "cpu_limit": "200m"}}
        assert len(w.patches("shop", "web")) == 1
        status = w.sizing_policy("shop", "web")["status"]
        (p,) = status["containers"]
        assert p["verdict"] == "Changed" and _m(p["newRequest"]) == want and _m(p["current"]) == 100
        assert status["lastChangeTime"] and status["observedGeneration"] == 1
        ready = {c["type"]: c for c in status["conditions"]}["Ready"]
        assert ready["status"] == "True"
        # one Event regarding the workload and the same regarding the policy (issue 10)
        changed = [e for e in w.events("shop") if e["reason"] == "CpuRequestChanged"]
        assert sorted((e["regarding"]["kind"], e["related"]["kind"]) for e in changed) == [
            ("Deployment", "SizingPolicy"), ("SizingPolicy", "Deployment")]
        assert {e["action"] for e in changed} == {"Rollout"}
        (row,) = r1.rows
        assert (row.verdict, _m(f"{row.proposed_m}m"), row.rate) == ("Changed", want, pytest.approx(50.0, rel=1e-6))

        before = w.resource_versions()
        r2 = rec.run_pass()
        # the second pass changes nothing in the cluster: no patch, no Event; the status
        # records once that the container now sits at its target
        assert r2.patched == () and r2.events == 0 and r2.status_writes <= 1
        after = w.resource_versions()
        assert {k: v for k, v in after.items() if "sizingpolicies" not in k} == \
            {k: v for k, v in before.items() if "sizingpolicies" not in k}
        assert r2.rows[0].verdict == "Held" and r2.rows[0].why == ("InsideDeadband",)
        assert w.sizing_policy("shop", "web")["status"]["lastChangeTime"] == status["lastChangeTime"]
        r3 = rec.run_pass()
        assert (r3.patched, r3.status_writes, r3.events) == ((), 0, 0)
        assert w.resource_versions() == after  # level-based: an unchanged world is left alone


def test_dry_run_proposes_writes_status_once_and_never_patches(tmp_path, shared_sizing_api) -> None:
    objects = [
        deployment("shop", "api", [("app", "1000m", "2000m")]),
        policy("shop", "api", workload="api", mode="DryRun", containers=[{"name": "app", "model": "shop/api/app"}]),
    ]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "api"): [25.0]}) as w:
        rec = w.reconciler()
        r1 = rec.run_pass()
        assert r1.patched == () and r1.status_writes == 1 and r1.events == 2  # on the workload and the policy
        assert [_m(q) for q in w.cpu("shop", "api", "app")] == [1000, 2000]
        (p,) = w.sizing_policy("shop", "api")["status"]["containers"]
        assert p["verdict"] == "Proposed" and _m(p["newRequest"]) == target_m(25.0)
        assert [(e["reason"], e["regarding"]["kind"]) for e in w.events("shop")] == [
            ("CpuRequestProposed", "Deployment"), ("CpuRequestProposed", "SizingPolicy")]
        before = w.resource_versions()
        r2 = rec.run_pass()
        assert (r2.status_writes, r2.events) == (0, 0) and w.resource_versions() == before


def test_forced_dry_run_overrides_apply_mode(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        r = w.reconciler(dry_run=True).run_pass()
        assert r.patched == () and r.rows[0].verdict == "Proposed"
        assert w.cpu("shop", "web", "app") == ("100m", None)


def test_plan_mode_writes_nothing_at_all(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        before = w.resource_versions()
        r = w.reconciler(dry_run=True, write=False).run_pass()
        assert r.rows[0].verdict == "Proposed" and r.rows[0].proposed_m == target_m(50.0)
        assert w.resource_versions() == before


def test_invalid_policy_gets_a_condition_naming_the_field_and_is_never_acted_on(tmp_path, shared_sizing_api) -> None:
    bad = policy("shop", "web", workload="web",
                 containers=[{"name": "app", "model": "shop/web/app", "floor": "300m", "ceiling": "200m"}])
    objects = [deployment("shop", "web", [("app", "100m", None)]), bad]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        rec = w.reconciler()
        r = rec.run_pass()
        assert r.invalid == 1 and r.patched == ()
        assert w.cpu("shop", "web", "app") == ("100m", None)
        cond = {c["type"]: c for c in w.sizing_policy("shop", "web")["status"]["conditions"]}["Ready"]
        assert cond["status"] == "False" and cond["reason"] == "PolicyInvalid"
        assert "spec.containers[0].floor" in cond["message"]
        assert r.rows[0].why == ("PolicyInvalid",)
        before = w.resource_versions()
        rec.run_pass()
        assert w.resource_versions() == before


def test_the_budget_is_shared_by_the_whole_pass(tmp_path, shared_sizing_api) -> None:
    names = ("a", "b", "c")
    objects = [o for n in names for o in (
        deployment("shop", n, [("app", "100m", None)]),
        policy("shop", n, workload=n, containers=[{"name": "app", "model": f"shop/{n}/app"}]))]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api,
               rates={("shop", n): [50.0] for n in names}) as w:
        budget = Budget(bucket=TokenBucket.per_minute(1, now=0.0))
        rec = w.reconciler(budget=budget, monotonic=lambda: 0.0)
        r = rec.run_pass()
        assert len(r.patched) == 1
        whys = sorted(row.why[0] for row in r.rows)
        assert whys == ["BudgetSpent", "BudgetSpent", "NewTarget"]
        changed = [n for n in names if w.cpu("shop", n, "app")[0] != "100m"]
        assert [f"shop/Deployment/{n}" for n in changed] == list(r.patched)


def test_cpu_utilisation_hpa_holds_the_workload(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "100m", None)]), hpa("shop", "web", target="web"),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        r = w.reconciler().run_pass()
        assert r.patched == () and r.rows[0].why == ("HorizontalConflict",)
        assert w.cpu("shop", "web", "app") == ("100m", None)


def test_unknown_model_is_held_nomodel(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/other"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        r = w.reconciler().run_pass()
        assert r.patched == () and r.rows[0].why == ("NoModel",)


def test_missing_workload_gets_a_condition(tmp_path, shared_sizing_api) -> None:
    objects = [policy("shop", "ghost", workload="ghost", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        r = w.reconciler().run_pass()
        cond = {c["type"]: c for c in w.sizing_policy("shop", "ghost")["status"]["conditions"]}["Ready"]
        assert cond["status"] == "False" and cond["reason"] == "WorkloadNotFound"
        assert r.rows[0].why == ("WorkloadNotFound",)
        w.reconciler().run_pass()
        assert [(e["reason"], e["type"]) for e in w.events("shop")] == [("WorkloadNotFound", "Warning")]


def test_telemetry_counts_decisions_and_patches(tmp_path, shared_sizing_api) -> None:
    from ratefit.controller.telemetry import Telemetry

    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        tel = Telemetry()
        rec = w.reconciler(telemetry=tel)
        rec.run_pass()
        rec.run_pass()
        assert tel.value("ratefit_controller_changes_total", {"resize_by": "Rollout"}) == 1
        assert tel.value("ratefit_controller_decisions_total", {"verdict": "Changed", "reason": "NewTarget"}) == 1
        assert tel.value("ratefit_controller_decisions_total", {"verdict": "Held", "reason": "InsideDeadband"}) == 1
        assert tel.value("ratefit_controller_passes_total", {"outcome": "done"}) == 2
        assert tel.value("ratefit_controller_pass_duration_seconds_count") == 2


def test_in_place_resizes_pods_keeps_the_template_and_reapplies_to_new_pods(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "100m", "200m")], replicas=2),
               policy("shop", "web", workload="web", resizeBy="InPlace",
                      containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        def pod_cpu() -> dict[str, tuple[int, int]]:
            out = {}
            for p in w.get("/api/v1/namespaces/shop/pods?labelSelector=app%3Dweb")["items"]:
                res = p["spec"]["containers"][0]["resources"]
                out[p["metadata"]["name"]] = (_m(res["requests"]["cpu"]), _m(res["limits"]["cpu"]))
            return out

        assert len(pod_cpu()) == 2
        rec = w.reconciler()
        r1 = rec.run_pass()
        assert r1.patched == ("shop/Deployment/web",)
        assert set(pod_cpu().values()) == {(315, 630)}  # every running pod resized (keep-ratio limit)
        assert w.cpu("shop", "web", "app") == ("100m", "200m")  # the template is left as it was
        assert "new pods start at the template value" in r1.rows[0].as_dict()["note"]
        r2 = rec.run_pass()
        assert r2.patched == () and r2.rows[0].why == ("InsideDeadband",)  # decided from what the pods run
        # a new pod starts at the template value (no scheduler in the sandbox: create it by hand)
        pod = w.get("/api/v1/namespaces/shop/pods?labelSelector=app%3Dweb")["items"][0]
        new = {"apiVersion": "v1", "kind": "Pod",
               "metadata": {"name": "web-new-pod", "namespace": "shop", "labels": pod["metadata"]["labels"]},
               "spec": {"containers": [{"name": "app", "image": "registry.invalid/kestrel/app:1",
                                        "resources": {"requests": {"cpu": "100m"}, "limits": {"cpu": "200m"}}}]}}
        w.sandbox.create(new)
        r3 = rec.run_pass()
        assert r3.patched == ()  # not a new change …
        assert pod_cpu()["web-new-pod"] == (315, 630)  # … but the decision is re-applied to the new pod


def test_concurrent_rollout_slots_are_shared_by_the_pass(tmp_path, shared_sizing_api) -> None:
    from ratefit.controller.limits import RolloutSlots

    names = ("a", "b")
    objects = [o for n in names for o in (
        deployment("shop", n, [("app", "100m", None)]),
        policy("shop", n, workload=n, containers=[{"name": "app", "model": f"shop/{n}/app"}]))]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", n): [50.0] for n in names}) as w:
        r = w.reconciler(budget=Budget(slots=RolloutSlots(1))).run_pass()
        assert len(r.patched) == 1
        assert sorted(row.why[0] for row in r.rows) == ["BudgetSpent", "NewTarget"]


def test_a_pass_that_loses_the_lease_acts_no_more(tmp_path, shared_sizing_api) -> None:
    from types import SimpleNamespace

    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        before = w.resource_versions()
        control = SimpleNamespace(should_stop=lambda: False, may_act=lambda: False)
        r = w.reconciler().run_pass(control)
        assert r.outcome is PassOutcome.ABANDONED and r.patched == ()
        assert w.resource_versions() == before  # no patch, no status, no Event


def test_invalid_policy_warns_once(tmp_path, shared_sizing_api) -> None:
    # passes the CRD's schema, refused by parse_policy (floor above ceiling)
    bad = policy("shop", "web", workload="web",
                 containers=[{"name": "app", "model": "shop/web/app", "floor": "300m", "ceiling": "200m"}])
    with world(tmp_path, objects=[deployment("shop", "web", [("app", "100m", None)]), bad],
               api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        rec = w.reconciler()
        rec.run_pass()
        rec.run_pass()
        warnings = [e for e in w.events("shop") if e["reason"] == "PolicyInvalid"]
        assert len(warnings) == 1 and warnings[0]["type"] == "Warning"
        assert "spec.containers[0].floor" in warnings[0]["note"]


def test_a_rolling_workload_keeps_its_rollout_slot_until_the_rollout_is_done(tmp_path, shared_sizing_api) -> None:
    """Level-based slots: the workloads the cluster shows rolling out hold the slots
    (updatedReplicas < replicas, Kubernetes Deployment status), whatever this process remembers."""
    import time

    from ratefit.controller.limits import RolloutSlots

    names = ("a", "b")
    objects = [o for n in names for o in (
        deployment("shop", n, [("app", "100m", None)], replicas=1),
        policy("shop", n, workload=n, containers=[{"name": "app", "model": f"shop/{n}/app"}]))]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", n): [50.0] for n in names},
               sandbox={"startup_seconds": 2.0}) as w:
        time.sleep(2.5)  # the first pods become ready
        rec = w.reconciler(budget=Budget(slots=RolloutSlots(1)))
        r1 = rec.run_pass()
        assert r1.patched == ("shop/Deployment/a",)
        r2 = rec.run_pass()  # a is still rolling out: its slot stays taken
        assert r2.patched == () and {row.workload: row.why[0] for row in r2.rows}["b"] == "BudgetSpent"
        deadline = time.monotonic() + 20
        while True:
            r3 = rec.run_pass()
            if r3.patched or time.monotonic() > deadline:
                break
            time.sleep(0.5)
        assert r3.patched == ("shop/Deployment/b",)
        assert parse_cpu(w.cpu("shop", "b", "app")[0]) == 315


def test_shards_split_the_policies_by_namespace(tmp_path, shared_sizing_api) -> None:
    """DESIGN.md "Scale path": every policy belongs to exactly one shard."""
    from ratefit.controller.reconcile import shard_of

    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", mode="DryRun", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        mine = shard_of("shop", 3)
        seen = [len(w.reconciler(write=False, shard=(i, 3)).run_pass().rows) for i in range(3)]
        assert seen == [1 if i == mine else 0 for i in range(3)]


def test_two_policies_on_one_workload_the_older_acts_the_newer_is_held(tmp_path, shared_sizing_api) -> None:
    # issue 10: never two contradictory rows — the older policy (creationTimestamp, then
    # name) keeps acting; the newer is held PolicyConflict with a Warning Event naming it
    objects = [
        deployment("shop", "web", [("app", "100m", "200m")]),
        policy("shop", "a-old", workload="web", containers=[{"name": "app", "model": "shop/web/app"}]),
        policy("shop", "b-new", workload="web", containers=[{"name": "app", "model": "shop/web/app"}],
               headroomPercent=100),
    ]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        r = w.reconciler().run_pass()
        assert r.outcome is PassOutcome.DONE, r.errors
        assert r.patched == ("shop/Deployment/web",) and len(w.patches("shop", "web")) == 1
        assert _m(w.cpu("shop", "web", "app")[0]) == target_m(50.0)  # a-old's headroom, not b-new's
        rows = {(row.policy, row.verdict, row.why) for row in r.rows}
        assert rows == {("a-old", "Changed", ("NewTarget",)), ("b-new", "Held", ("PolicyConflict",))}
        new = w.sizing_policy("shop", "b-new")["status"]
        conds = {c["type"]: c for c in new["conditions"]}
        assert (conds["Conflict"]["status"], conds["Ready"]["status"]) == ("True", "False")
        assert "shop/a-old" in conds["Conflict"]["message"]
        (row,) = new["containers"]
        assert (row["verdict"], row["reason"]) == ("Held", "PolicyConflict") and "newRequest" not in row
        old = w.sizing_policy("shop", "a-old")["status"]
        assert {c["type"]: c["status"] for c in old["conditions"]}["Conflict"] == "False"
        (warn,) = [e for e in w.events("shop") if e["reason"] == "PolicyConflict"]
        assert warn["type"] == "Warning" and warn["regarding"]["name"] == "b-new" and "shop/a-old" in warn["note"]
