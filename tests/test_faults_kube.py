"""Faults of the Kubernetes API during a pass, against the sandbox API server.

- 409 Conflict: someone changes the workload between our read and our patch (the
  patch carries the resourceVersion we read, so the API server refuses it —
  Kubernetes API concepts, "Resource versions" / optimistic concurrency): reconcile
  re-reads, recomputes and patches once, keeping the other writer's change.
- 429 with Retry-After once: the adapter waits and retries; exactly one patch lands.
- 5xx that does not go away: nothing is patched, the workload backs off, and once the
  API server is healthy and the backoff has passed the next pass patches it once.
"""

from __future__ import annotations

import random

import httpx

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, deployment, policy, world
from ratefit.controller.limits import Budget, ExponentialBackoff, TokenBucket
from ratefit.controller.quantity import parse_cpu

OBJECTS = [
    deployment("shop", "web", [("app", "100m", None)]),
    policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}]),
]
RATES = {("shop", "web"): [50.0]}
PATH = r"/apis/apps/v1/namespaces/shop/deployments/web$"


def test_conflict_rereads_recomputes_and_patches_once(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        interfered = []

        def someone_else_edits(point: str) -> None:
            if point == "after-dry-run" and not interfered:
                interfered.append(point)
                r = httpx.patch(w.sandbox.url + "/apis/apps/v1/namespaces/shop/deployments/web",
                                json={"metadata": {"labels": {"team": "parcels"}}},
                                headers={"Content-Type": "application/merge-patch+json"}, timeout=10)
                r.raise_for_status()

        budget = Budget(bucket=TokenBucket.per_minute(2, now=0.0))
        rec = w.reconciler(crash_hook=someone_else_edits, budget=budget, monotonic=lambda: 0.0)
        r = rec.run_pass()
        assert interfered and r.patched == ("shop/Deployment/web",)
        assert budget.view(0.0).changes_left == 1  # the retry after the conflict took no second token
        obj = w.workload("shop", "web")
        assert obj["metadata"]["labels"]["team"] == "parcels"  # the other writer's change is kept
        assert parse_cpu(w.cpu("shop", "web", "app")[0]) == 315
        ours = [q for q in w.patches("shop", "web") if q["contentType"].startswith("application/strategic-merge-patch")]
        assert len(ours) == 2  # one refused with 409 (stale resourceVersion), one accepted after the re-read
        import json

        prev = json.loads(obj["metadata"]["annotations"]["ratefit.dev/previous-requests"])
        assert prev == {"app": {"cpu_request": "100m", "cpu_limit": None}}


def test_429_with_retry_after_is_waited_out_and_patched_once(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        waits: list[float] = []
        kube = w.kube(sleep=waits.append)
        w.sandbox.faults.add("PATCH", PATH, status=429, retry_after=1, count=1)
        r = w.reconciler(kube=kube).run_pass()
        assert r.patched == ("shop/Deployment/web",)
        assert waits and waits[0] == 1.0  # Retry-After honoured (RFC 9110 §10.2.3: delay in seconds)
        assert parse_cpu(w.cpu("shop", "web", "app")[0]) == 315
        assert len(w.patches("shop", "web")) == 1


def test_persistent_5xx_patches_nothing_then_backs_off_then_converges(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        rule = w.sandbox.faults.add("PATCH", PATH, status=503, count=None)
        clock = [1000.0]
        rec = w.reconciler(backoff=ExponentialBackoff(base=30.0, cap=300.0, rng=random.Random(1)),
                           monotonic=lambda: clock[0])
        r1 = rec.run_pass()
        assert r1.patched == () and rule.hits >= 2  # the adapter retried, then gave up
        assert r1.rows[0].why == ("Rejected",) and r1.requeue_after is not None
        assert w.cpu("shop", "web", "app") == ("100m", None)
        w.sandbox.faults.clear()
        hits_before = len([q for q in w.sandbox.requests if q["method"] == "PATCH"])
        r2 = rec.run_pass()  # still inside the backoff: not even tried
        assert r2.patched == ()
        assert len([q for q in w.sandbox.requests if q["method"] == "PATCH"]) == hits_before
        clock[0] += 301.0
        r3 = rec.run_pass()
        assert r3.patched == ("shop/Deployment/web",)
        assert parse_cpu(w.cpu("shop", "web", "app")[0]) == 315
        assert len(w.patches("shop", "web")) == 1


LIST_PATH = r"/apis/apps/v1/namespaces/shop/deployments$"


def test_503_on_the_workload_list_holds_apiunavailable_and_keeps_the_status(tmp_path, shared_sizing_api) -> None:
    """A LIST that fails with 503 (after the adapter's retries) says nothing about the
    workload: it is held ApiUnavailable — not WorkloadNotFound — with no status write
    and no Event, so the stored proposals and Ready condition stay as they were
    (Kubernetes API conventions: 503 is a temporary failure; clients retry)."""
    objects = [deployment("shop", "web", [("app", "100m", None)]),
               policy("shop", "web", workload="web", mode="DryRun",
                      containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates=RATES) as w:
        first = w.reconciler().run_pass()
        assert first.rows[0].verdict == "Proposed"
        stored = w.sizing_policy("shop", "web")["status"]
        events = [e["reason"] for e in w.events("shop")]
        rule = w.sandbox.faults.add("GET", LIST_PATH, status=503, count=None)
        r = w.reconciler().run_pass()
        assert rule.hits >= 2  # the adapter retried, then gave up
        assert [row.why for row in r.rows] == [("ApiUnavailable",)]
        assert r.rows[0].verdict == "Held"
        assert r.rows[0].note.startswith("listing Deployments in shop failed") and "last status is kept" in r.rows[0].note
        assert r.status_writes == 0 and r.events == 0 and r.outcome.value == "degraded"
        assert w.sizing_policy("shop", "web")["status"] == stored  # the last status is kept
        assert [e["reason"] for e in w.events("shop")] == events  # no WorkloadNotFound Event
        w.sandbox.faults.clear()
        again = w.reconciler().run_pass()  # the API is back: decided as before, nothing new to say
        assert again.rows[0].verdict == "Proposed" and again.status_writes == 0


def test_503_on_the_hpa_list_holds_apiunavailable(tmp_path, shared_sizing_api) -> None:
    """Without the autoscaler list the HorizontalConflict gate cannot be checked: hold
    (ApiUnavailable) rather than change a workload an HPA may be scaling on CPU."""
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        w.sandbox.faults.add("GET", r"/apis/autoscaling/v2/namespaces/shop/horizontalpodautoscalers$",
                             status=503, count=None)
        r = w.reconciler().run_pass()
        assert [row.why for row in r.rows] == [("ApiUnavailable",)]
        assert r.patched == () and w.cpu("shop", "web", "app") == ("100m", None)
        assert "status" not in w.sizing_policy("shop", "web") or not w.sizing_policy("shop", "web")["status"]
