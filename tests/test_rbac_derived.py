"""The controller's RBAC is derived from what it does, not written from memory (issue 9).

The real `ratefit run` (subprocess, with leader election) runs against the sandbox with
a Rollout policy, an InPlace policy, a DryRun policy and an autoscaler: two `--once`
passes (the first changes, the second holds), then a continuous run long enough to open
its watch. Every request the sandbox served is logged with its authorization attributes
(verb from the HTTP method as the Kubernetes docs define it — "Authorization" →
"Determine the request verb": POST create, GET get/list/watch, PUT update, PATCH patch,
DELETE delete/deletecollection), and the (group, resource[/subresource], verb) set of
those requests must equal the rules of manifests/base/rbac.yaml, except for one
documented extra: list+watch on every kind the controller's watch-fed cache holds
(CACHE_KINDS) — a cache lists once then watches, and a run of this length does not show
every watch — and get on Deployments/StatefulSets (CONFLICT_REREAD): the re-read after a
409 Conflict on a patch, which a run without conflicts never makes. Non-resource requests (discovery, /version) are left out: every
authenticated user may make them (the default ClusterRole system:discovery).

If the controller starts making a request the manifests do not grant, or the manifests
grant a verb the controller never uses, this test fails and names it.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

from ratefit.controller.local_servers import stop_process
# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import deployment, hpa, policy, shared_sizing_api, statefulset, world  # noqa: F401

ROOT = Path(__file__).resolve().parent.parent
RATEFIT = Path(sys.executable).with_name("ratefit")
LEASE_NS = "ratefit-system"

#: the re-read after a 409 on a patch (controller/stages/act.py); no conflict in this run
CONFLICT_REREAD = {("apps", "deployments", "get"), ("apps", "statefulsets", "get")}
#: kinds the controller's watch-fed cache lists and watches (group, resource)
CACHE_KINDS = {("ratefit.dev", "sizingpolicies"), ("apps", "deployments"), ("apps", "statefulsets"),
               ("autoscaling", "horizontalpodautoscalers"), ("", "pods")}


def _rbac_rules() -> tuple[set[tuple[str, str, str]], set[tuple[str, str, str]]]:
    """(cluster-wide grants, grants in the Lease namespace) of manifests/base/rbac.yaml."""
    docs = [d for d in yaml.safe_load_all((ROOT / "manifests" / "base" / "rbac.yaml").read_text()) if d]
    cluster, local = set(), set()
    for d in docs:
        if d["kind"] not in ("ClusterRole", "Role"):
            continue
        target = cluster if d["kind"] == "ClusterRole" else local
        if d["kind"] == "Role":
            assert d["metadata"]["namespace"] == LEASE_NS
        for rule in d["rules"]:
            assert "resourceNames" not in rule and "nonResourceURLs" not in rule
            target |= {(g, r, v) for g in rule["apiGroups"] for r in rule["resources"] for v in rule["verbs"]}
    return cluster, local


def _observed(requests: list[dict]) -> tuple[set[tuple[str, str, str]], set[str]]:
    seen, lease_namespaces = set(), set()
    for e in requests:
        a = e.get("attributes") or {}
        if "resource" not in a:  # non-resource: discovery, /version, /openapi
            continue
        res = a["resource"] + (f"/{a['subresource']}" if a.get("subresource") else "")
        seen.add((a.get("group", ""), res, a["verb"]))
        if a["resource"] == "leases":
            lease_namespaces.add(a.get("namespace", ""))
    return seen, lease_namespaces


def _cli(w, *extra: str) -> list[str]:
    return [str(RATEFIT), "run", "--metrics-port", "-1", "--kubeconfig", str(w.kubeconfig), "--replay", str(w.history),
            "--rate-at", str(w.at), "--sizing-api", w.api_url, "--lease-namespace", LEASE_NS, *extra]


@pytest.mark.slow
def test_rbac_rules_are_exactly_what_a_full_run_requests(tmp_path, shared_sizing_api) -> None:  # noqa: F811
    objects = [
        deployment("shop", "web", [("app", "100m", "200m"), ("side", "50m", None)]),
        policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}]),
        statefulset("shop", "api", [("app", "100m", "200m")]),
        policy("shop", "api", workload="api", kind="StatefulSet", resizeBy="InPlace",
               containers=[{"name": "app", "model": "shop/api/app"}]),
        deployment("shop", "a", [("app", "100m", "200m")]),
        policy("shop", "a", workload="a", mode="DryRun", containers=[{"name": "app", "model": "shop/a/app"}]),
        hpa("shop", "a", target="a", cpu_utilization=False),
    ]
    rates = {("shop", "web"): [50.0], ("shop", "api"): [50.0], ("shop", "a"): [50.0]}
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates=rates) as w:
        w.sandbox.create({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": LEASE_NS}})
        w.sandbox.clear_requests()
        for _ in range(2):  # pass 1 changes (rollout + resize + proposal), pass 2 holds (cooldown)
            r = subprocess.run(_cli(w, "--once"), capture_output=True, text=True, timeout=180)
            assert r.returncode == 0, r.stderr[-3000:]
        # the changes really happened, so the log holds the write paths
        assert w.patches("shop", "web"), "the rollout policy patched nothing"
        # a continuous run: passes on an interval plus the watch on policies
        proc = subprocess.Popen(_cli(w, "--interval", "2s"), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                text=True, start_new_session=True, env={**os.environ})
        try:
            deadline = time.monotonic() + 60
            while time.monotonic() < deadline:
                seen, _ = _observed(w.sandbox.requests)
                if ("ratefit.dev", "sizingpolicies", "watch") in seen:
                    break
                time.sleep(0.2)
        finally:
            stop_process(proc)
        seen, lease_namespaces = _observed(w.sandbox.requests)

    cluster, local = _rbac_rules()
    assert lease_namespaces == {LEASE_NS}
    lease_seen = {t for t in seen if t[1] == "leases"}
    assert lease_seen == local, f"Lease verbs used {sorted(lease_seen)} vs granted {sorted(local)}"
    used = seen - lease_seen
    extra = {(g, r, v) for g, r in CACHE_KINDS for v in ("list", "watch")} | CONFLICT_REREAD
    granted_beyond_use = cluster - used - extra
    missing = used - cluster
    assert not missing, f"the controller made requests rbac.yaml does not grant: {sorted(missing)}"
    assert not granted_beyond_use, f"rbac.yaml grants what the controller never uses: {sorted(granted_beyond_use)}"
    # the derived set itself, so a reader sees what a full run needs (and the test is not vacuous)
    for must in [("apps", "deployments", "patch"), ("", "pods/resize", "patch"), ("events.k8s.io", "events", "create"),
                 ("ratefit.dev", "sizingpolicies/status", "patch"), ("ratefit.dev", "sizingpolicies", "watch")]:
        assert must in used


def test_rbac_grants_no_wildcards_and_no_secrets() -> None:
    cluster, local = _rbac_rules()
    for g, r, v in cluster | local:
        assert "*" not in (g, r, v)
        assert r != "secrets" and v not in ("delete", "deletecollection", "escalate", "bind", "impersonate")


@pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")
def test_the_rbac_file_is_what_the_overlays_render() -> None:
    out = subprocess.run(["kubectl", "kustomize", str(ROOT / "manifests" / "overlays" / "apply")],
                         capture_output=True, text=True, check=True).stdout
    rendered = {(d["kind"], d["metadata"]["name"]): d["rules"] for d in yaml.safe_load_all(out)
                if d and d["kind"] in ("ClusterRole", "Role") and d["metadata"]["name"].startswith("ratefit-controller")
                or d and d["kind"] == "Role"}
    source = {(d["kind"], d["metadata"]["name"]): d["rules"]
              for d in yaml.safe_load_all((ROOT / "manifests" / "base" / "rbac.yaml").read_text())
              if d and d["kind"] in ("ClusterRole", "Role")}
    assert rendered == source


def test_the_one_permission_list_matches_the_rbac_file() -> None:
    """`ratefit check` asks one SelfSubjectAccessReview per entry of
    ratefit.controller.permissions (issue 11): that list, the RBAC file and the derived set
    above must be one and the same."""
    permissions = pytest.importorskip("ratefit.controller.permissions",
                                      reason="the permission list of `ratefit check` is not in this tree yet")
    cluster, local = _rbac_rules()
    listed = {(p.group, p.resource, p.verb) for p in permissions.all_permissions() if not p.lease}
    listed_lease = {(p.group, p.resource, p.verb) for p in permissions.all_permissions() if p.lease}
    assert listed == cluster, (f"in the list, not granted: {sorted(listed - cluster)}; "
                               f"granted, not in the list: {sorted(cluster - listed)}")
    assert listed_lease == local
