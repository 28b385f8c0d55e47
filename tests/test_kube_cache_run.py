"""`ratefit run` on the watch-fed cache: a steady-state pass sends no LIST (counted in
the sandbox's request log), the decisions equal those of a LIST-based pass, and
``/readyz`` stays 503 until the cache has synced (real `ratefit run` process, real
HTTP GET). Real parts: the sandbox API server, `ratefit serve`, the replay rate source.
INVENTED test scenario (tests/reconcile_fixtures.py)."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import httpx
from prometheus_client.parser import text_string_to_metric_families

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import (  # noqa: F401
    deployment, hpa, policy, running_controller, shared_sizing_api, statefulset, world)
from ratefit.controller.kube_cache import CachedKube, KubeCache

RATEFIT = Path(sys.executable).with_name("ratefit")
OBJECTS = [
    deployment("shop", "web", [("app", "1000m", None), ("side", "200m", None)]),
    deployment("shop", "api", [("app", "100m", "1")]),
    statefulset("shop", "a", [("app", "400m", None)]),
    hpa("shop", "api", target="api", cpu_utilization=False),
    policy("shop", "web", workload="web", mode="DryRun",
           containers=[{"name": "app", "model": "shop/web/app"}, {"name": "side", "model": "shop/web/side"}]),
    policy("shop", "api", workload="api", mode="DryRun", containers=[{"name": "app", "model": "shop/api/app"}]),
    policy("shop", "a", workload="a", kind="StatefulSet", mode="DryRun", resizeBy="InPlace",
           containers=[{"name": "app", "model": "shop/a/app"}]),
]
RATES = {("shop", "web"): [50.0, 40.0], ("shop", "api"): [10.0], ("shop", "a"): [30.0]}


def _is_list(r: dict) -> bool:
    """A LIST: a GET of a collection that is not a watch (the sandbox's request log)."""
    return r["method"] == "GET" and r["query"].get("watch") != "true" and "limit" in r["query"]


def _rows(result) -> list[tuple]:
    return sorted((r.namespace, r.workload, r.container, r.current_m, r.proposed_m, r.verdict, r.why) for r in result.rows)


def test_a_steady_state_pass_sends_no_list_and_decides_as_a_listing_pass(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        adapter = w.kube()
        cache = KubeCache.for_adapter(adapter, namespaces=["shop"]).start()
        try:
            assert cache.wait_synced(20)
            rec = w.reconciler(kube=CachedKube(reader=cache, writer=adapter), dry_run=True, namespaces=("shop",))
            first = rec.run_pass()
            assert first.status_writes == 3
            time.sleep(0.5)  # let the watch deliver our own status writes (they are also remembered at once)
            w.sandbox.clear_requests()
            steady = rec.run_pass()
            served = list(w.sandbox.requests)
            assert [r for r in served if _is_list(r)] == []  # no LIST: everything came from the cache
            assert [r for r in served if r["method"] != "GET"] == []  # nothing changed, nothing written
            assert steady.status_writes == 0 and steady.events == 0
            # the same decisions as a pass that LISTs everything (what `ratefit plan` does)
            listing = w.reconciler(dry_run=True, write=False, namespaces=("shop",)).run_pass()
            assert _rows(steady) == _rows(listing) and len(steady.rows) == 4
            assert steady.errors == listing.errors  # the same reads give the same (rate) complaints
        finally:
            cache.stop()


def test_readyz_is_503_until_the_cache_has_synced(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        # the cache's first LIST of policies takes 4 s: the controller cannot be ready before
        w.sandbox.faults.add("GET", r"/sizingpolicies$", latency=4.0, count=1)
        deadline = time.monotonic() + 30
        with running_controller(w, "--interval", "300s", "--dry-run", timeout=30) as run:
            url = run.url
            r = httpx.get(url + "/readyz", timeout=5)
            assert r.status_code == 503 and "cache has not synced" in r.text
            assert httpx.get(url + "/healthz", timeout=5).status_code == 200
            while httpx.get(url + "/readyz", timeout=5).status_code != 200:
                assert time.monotonic() < deadline + 30, run.log_text()[-2000:]
                time.sleep(0.1)
            assert w.sandbox.faults.rules[0].hits == 1  # the delayed LIST was the cache's
            assert w.sizing_policy("shop", "web").get("status", {}).get("observedGeneration") == 1
            metrics = {s.name + str(sorted(s.labels.items())): s.value
                       for fam in text_string_to_metric_families(httpx.get(url + "/metrics", timeout=5).text)
                       for s in fam.samples}
            assert metrics["ratefit_controller_cache_synced[]"] == 1.0
            assert metrics["ratefit_controller_cache_objects[('resource', 'deployments')]"] == 2.0
            assert metrics["ratefit_controller_cache_lists_total[('resource', 'sizingpolicies')]"] == 1.0
            # the in-place policy's namespace has a pod informer (shop/a has 2 pods)
            assert metrics["ratefit_controller_cache_objects[('resource', 'pods')]"] >= 2.0
        assert run.code == 0, run.log_text()[-2000:]


def test_a_bad_resync_period_is_an_error_naming_the_flag(tmp_path) -> None:
    r = subprocess.run([str(RATEFIT), "run", "--sizing-api", "http://127.0.0.1:1", "--replay", str(tmp_path / "none.om"),
                        "--cache-resync", "soon"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "--cache-resync" in r.stderr and "duration" in r.stderr
