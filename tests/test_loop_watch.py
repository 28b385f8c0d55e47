"""`ratefit run` wakes up on a policy change (watch) instead of waiting for --interval,
and its log is one JSON object per line. Real process, real sandbox watch stream."""

from __future__ import annotations

import json
import time

import httpx

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import deployment, policy, running_controller, shared_sizing_api, world
from ratefit.controller.quantity import parse_cpu


def test_a_spec_change_wakes_the_loop_and_logs_are_json(tmp_path, shared_sizing_api) -> None:
    objects = [deployment("shop", "web", [("app", "1000m", None)]),
               policy("shop", "web", workload="web", mode="DryRun", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        with running_controller(w, "--interval", "300s", health=False) as run:
            def status():
                return w.sizing_policy("shop", "web").get("status") or {}

            deadline = time.monotonic() + 60
            while status().get("observedGeneration") != 1:
                assert time.monotonic() < deadline, run.log_text()[-2000:]
                time.sleep(0.2)
            assert parse_cpu(status()["containers"][0]["newRequest"]) == 315  # headroomPercent 15: ceil5(270 × 1.15)
            r = httpx.patch(w.sandbox.url + "/apis/ratefit.dev/v1alpha1/namespaces/shop/sizingpolicies/web",
                            json={"spec": {"headroomPercent": 50}}, headers={"Content-Type": "application/merge-patch+json"},
                            timeout=10)
            r.raise_for_status()
            changed_at = time.monotonic()
            while status().get("observedGeneration") != 2:
                assert time.monotonic() - changed_at < 30, "the loop did not wake up on the spec change"
                time.sleep(0.2)
            assert parse_cpu(status()["containers"][0]["newRequest"]) == 405  # ceil5(270 × 1.5)
        assert run.code == 0
        lines = [ln for ln in (tmp_path / "run.log").read_text().splitlines() if ln.startswith("{")]
        docs = [json.loads(ln) for ln in lines]
        assert any(d.get("msg") == "pass" and d.get("outcome") == "done" for d in docs)
        assert any(d.get("msg") == "decision" and d.get("verdict") == "Proposed" for d in docs)
        assert all({"time", "level", "logger"} <= set(d) for d in docs)
