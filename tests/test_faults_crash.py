"""A crash mid-pass never leaves a workload half-patched, and the next run converges
without a duplicate change. `ratefit run --once` subprocesses are killed (SIGKILL) at
injected points through the documented test hook RATEFIT_CRASH_AT=<point>:<n>
(controller/reconcile.py: after-dry-run, after-patch, after-status); then a clean
run finishes the job. The sandbox objects are asserted, not the calls made.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, deployment, policy, world
from ratefit.controller.quantity import parse_cpu

RATEFIT = Path(sys.executable).with_name("ratefit")
RATES = {("shop", "a"): [50.0], ("shop", "b"): [50.0]}


def _objects(**spec):
    return [o for n in ("a", "b") for o in (
        deployment("shop", n, [("app", "100m", "200m")]),
        policy("shop", n, workload=n, containers=[{"name": "app", "model": f"shop/{n}/app"}], **spec))]


def run_controller(w, *, crash_at: str | None = None, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ)
    env.pop("RATEFIT_CRASH_AT", None)
    if crash_at:
        env["RATEFIT_CRASH_AT"] = crash_at
    cmd = [str(RATEFIT), "run", "--kubeconfig", str(w.kubeconfig), "--replay", str(w.history),
           "--rate-at", str(w.at), "--sizing-api", w.api_url, "--once", "--no-leader-election",
           "--metrics-port", "-1", "--budget-per-minute", "0", "--max-rollouts", "0"]
    return subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout)


def _req(w, name: str) -> int:
    return parse_cpu(w.cpu("shop", name, "app")[0])


def test_crash_between_dry_run_and_patch_changes_nothing_then_converges(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects(), api_url=shared_sizing_api, rates=RATES) as w:
        p = run_controller(w, crash_at="after-dry-run:1")
        assert p.returncode == -signal.SIGKILL, p.stderr
        assert (_req(w, "a"), _req(w, "b")) == (100, 100)  # the dry run stored nothing
        assert w.patches("shop", "a") == [] and w.patches("shop", "b") == []
        p2 = run_controller(w)
        assert p2.returncode == 0, p2.stderr
        assert (_req(w, "a"), _req(w, "b")) == (315, 315)
        assert len(w.patches("shop", "a")) == 1 and len(w.patches("shop", "b")) == 1


def test_crash_between_two_workloads_then_converges_without_a_duplicate(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects(), api_url=shared_sizing_api, rates=RATES) as w:
        p = run_controller(w, crash_at="after-patch:1")
        assert p.returncode == -signal.SIGKILL, p.stderr
        # one workload fully changed, the other not at all: never half a workload
        assert (_req(w, "a"), _req(w, "b")) == (315, 100)
        assert parse_cpu(w.cpu("shop", "a", "app")[1]) == 630  # its limit moved in the same patch
        assert "status" not in w.sizing_policy("shop", "a") or not w.sizing_policy("shop", "a")["status"].get("containers")
        p2 = run_controller(w)
        assert p2.returncode == 0, p2.stderr
        assert (_req(w, "a"), _req(w, "b")) == (315, 315)
        assert len(w.patches("shop", "a")) == 1  # not patched again
        assert len(w.patches("shop", "b")) == 1
        prev = json.loads(w.workload("shop", "a")["metadata"]["annotations"]["ratefit.dev/previous-requests"])
        assert prev == {"app": {"cpu_request": "100m", "cpu_limit": "200m"}}


def test_crash_after_a_step_limited_patch_keeps_the_cooldown(tmp_path, shared_sizing_api) -> None:
    """The status write is lost with the process, but the change time travelled in the
    same patch (annotation ratefit.dev/last-change): the next run does not take a
    second step inside the cooldown."""
    objects = _objects(stepLimit={"maxIncreasePercent": 100, "maxDecreasePercent": 50}, cooldown="30m")
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates=RATES) as w:
        p = run_controller(w, crash_at="after-patch:1")
        assert p.returncode == -signal.SIGKILL, p.stderr
        assert _req(w, "a") == 200  # ×2 step toward 315
        assert w.workload("shop", "a")["metadata"]["annotations"].get("ratefit.dev/last-change")
        p2 = run_controller(w)
        assert p2.returncode == 0, p2.stderr
        assert _req(w, "a") == 200  # CoolingDown: no duplicate step
        assert _req(w, "b") == 200
        props = {x["name"]: x for x in w.sizing_policy("shop", "a")["status"]["containers"]}
        assert props["app"]["verdict"] == "Held" and props["app"]["reason"] == "CoolingDown"
        assert len(w.patches("shop", "a")) == 1


def test_crash_after_a_status_write_then_converges(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects(), api_url=shared_sizing_api, rates=RATES) as w:
        p = run_controller(w, crash_at="after-status:1")
        assert p.returncode == -signal.SIGKILL, p.stderr
        p2 = run_controller(w)
        assert p2.returncode == 0, p2.stderr
        assert (_req(w, "a"), _req(w, "b")) == (315, 315)
        assert len(w.patches("shop", "a")) == 1 and len(w.patches("shop", "b")) == 1
        before = w.resource_versions()
        p3 = run_controller(w)
        assert p3.returncode == 0
        after = w.resource_versions()
        assert {k: v for k, v in after.items() if "/apis/apps/" in k} == {k: v for k, v in before.items() if "/apis/apps/" in k}


def test_crash_after_in_place_resizes_then_converges(tmp_path, shared_sizing_api) -> None:
    """resizeBy InPlace: killed after the pods were resized (before the status write), the
    next run decides from what the pods run and resizes nothing again."""
    objects = [deployment("shop", "a", [("app", "100m", "200m")], replicas=2),
               policy("shop", "a", workload="a", resizeBy="InPlace", containers=[{"name": "app", "model": "shop/a/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "a"): [50.0]}) as w:
        def pods() -> list[int]:
            items = w.get("/api/v1/namespaces/shop/pods?labelSelector=app%3Da")["items"]
            return sorted(parse_cpu(p["spec"]["containers"][0]["resources"]["requests"]["cpu"]) for p in items)

        def resizes() -> list[str]:
            return [r["path"] for r in w.sandbox.requests if r["method"] == "PATCH" and r["path"].endswith("/resize")
                    and r["query"].get("dryRun") != "All"]

        p = run_controller(w, crash_at="after-patch:1")
        assert p.returncode == -signal.SIGKILL, p.stderr
        assert pods() == [315, 315] and len(resizes()) == 2
        assert not (w.sizing_policy("shop", "a").get("status") or {}).get("containers")  # the status was lost
        # ... but the change time is on the workload (metadata only: no new generation, no rollout),
        # so the cooldown survives the crash
        wl = w.workload("shop", "a")
        assert "ratefit.dev/last-change" in wl["metadata"]["annotations"]
        assert wl["metadata"]["generation"] == 1
        p2 = run_controller(w)
        assert p2.returncode == 0, p2.stderr
        assert pods() == [315, 315]
        assert len(resizes()) == 2 and len(set(resizes())) == 2  # each pod resized exactly once
        assert w.cpu("shop", "a", "app") == ("100m", "200m")  # the template is left as it was
        (prop,) = w.sizing_policy("shop", "a")["status"]["containers"]
        assert (prop["verdict"], prop["reason"]) == ("Held", "InsideDeadband")
