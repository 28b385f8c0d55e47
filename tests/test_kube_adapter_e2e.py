"""The Kubernetes adapter end to end: the official ``kubernetes`` client over real HTTP
against the local sandbox API server (controller/sandbox, a stand-in for a cluster).

Each test works in a namespace of its own, so tests do not see each other's objects.
The same tests run against a real cluster with the ``cluster`` marker:
``RATEFIT_CLUSTER_KUBECONFIG=~/.kube/config pytest tests/test_kube_adapter_e2e.py -m cluster``
(the SizingPolicy CRD must be installed; namespaces ``ratefit-t-*`` are created and
deleted; tests that need the sandbox's fault injection or request log are skipped).
That path was exercised here only against a ``ratefit sandbox`` process posing as a
cluster — no real cluster was available.
What is checked comes from the Kubernetes API docs: strategic merge of containers by
``name``; ``dryRun=All`` stores nothing; a stale ``metadata.resourceVersion`` in a patch
gives 409; status-subresource writes do not move ``generation``; Events (events.k8s.io/v1)
fields; the Lease fields and client-go's leader-election rules (from memory).
"""

from __future__ import annotations

import os
import queue
import re
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from kubernetes import client as k8s

from ratefit.controller.errors import KubeConflict, KubeInvalid, KubeNotFound, KubeUnavailable
from ratefit.controller.kube import REPORTING_CONTROLLER, KubeAdapter, retry_on_conflict
from ratefit.controller.kube_retry import RetryPolicy
from ratefit.controller.sandbox.server import SandboxServer
from ratefit.controller.workload import PREVIOUS_REQUESTS_ANNOTATION, CpuChange, EventType, WorkloadKind

ROOT = Path(__file__).resolve().parent.parent
CRD = ROOT / "manifests" / "crd" / "sizingpolicy.yaml"

# A minimal stand-in CRD of the same group/plural, used only if the project's CRD is missing.
MINIMAL_CRD = {
    "apiVersion": "apiextensions.k8s.io/v1",
    "kind": "CustomResourceDefinition",
    "metadata": {"name": "sizingpolicies.ratefit.dev"},
    "spec": {
        "group": "ratefit.dev",
        "scope": "Namespaced",
        "names": {"plural": "sizingpolicies", "singular": "sizingpolicy", "kind": "SizingPolicy",
                  "listKind": "SizingPolicyList"},
        "versions": [{
            "name": "v1alpha1", "served": True, "storage": True,
            "subresources": {"status": {}},
            "schema": {"openAPIV3Schema": {"type": "object", "properties": {
                "spec": {"type": "object", "x-kubernetes-preserve-unknown-fields": True},
                "status": {"type": "object", "x-kubernetes-preserve-unknown-fields": True}}}},
        }],
    },
}


class Target:
    """Where the suite runs: the sandbox (always), or a real cluster given by
    RATEFIT_CLUSTER_KUBECONFIG (marker ``cluster``; the SizingPolicy CRD must be
    installed there). Tests that need the sandbox's fault injection or request log ask
    for ``target.sandbox``, which skips them on a real cluster."""

    def __init__(self, *, sandbox: SandboxServer | None = None, kubeconfig: str | None = None) -> None:
        self._sandbox = sandbox
        self._kubeconfig = kubeconfig
        self._api = self.api_client()

    @property
    def is_sandbox(self) -> bool:
        return self._sandbox is not None

    @property
    def sandbox(self) -> SandboxServer:
        if self._sandbox is None:
            pytest.skip("needs the sandbox's fault injection / request log")
        return self._sandbox

    def api_client(self) -> k8s.ApiClient:
        if self._sandbox is not None:
            return self._sandbox.api_client()
        from kubernetes import config

        return config.new_client_from_config(config_file=self._kubeconfig)

    def write_kubeconfig(self, path: Path) -> Path:
        if self._sandbox is not None:
            return self._sandbox.write_kubeconfig(path)
        return Path(str(self._kubeconfig))

    def create(self, obj: dict) -> dict:
        if self._sandbox is not None:
            return self._sandbox.create(obj)
        api, kind, ns = self._api, obj["kind"], obj["metadata"].get("namespace")
        if kind == "Namespace":
            out = k8s.CoreV1Api(api).create_namespace(obj)
        elif kind == "Deployment":
            out = k8s.AppsV1Api(api).create_namespaced_deployment(ns, obj)
        elif kind == "StatefulSet":
            out = k8s.AppsV1Api(api).create_namespaced_stateful_set(ns, obj)
        elif kind == "HorizontalPodAutoscaler":
            out = k8s.AutoscalingV2Api(api).create_namespaced_horizontal_pod_autoscaler(ns, obj)
        elif kind == "Lease":
            out = k8s.CoordinationV1Api(api).create_namespaced_lease(ns, obj)
        elif kind == "SizingPolicy":
            return k8s.CustomObjectsApi(api).create_namespaced_custom_object(
                "ratefit.dev", "v1alpha1", ns, "sizingpolicies", obj)
        else:
            raise AssertionError(f"the test target cannot create {kind}")
        return api.sanitize_for_serialization(out)

    def delete_namespace(self, name: str) -> None:
        if self._sandbox is None:
            k8s.CoreV1Api(self._api).delete_namespace(name)

    def wait_for_pods(self, ns: str, selector: str, count: int, timeout: float = 120) -> None:
        """The sandbox makes pods at once; a real cluster needs a while to run them."""
        deadline = time.monotonic() + timeout
        core = k8s.CoreV1Api(self._api)
        while True:
            pods = core.list_namespaced_pod(ns, label_selector=selector).items
            running = [p for p in pods if p.status and p.status.phase == "Running" and not p.metadata.deletion_timestamp]
            if len(running) == count and len(pods) == count:
                return
            if time.monotonic() > deadline:
                raise AssertionError(f"{len(running)}/{count} pods running in {ns} after {timeout} s")
            time.sleep(1)

    def close(self) -> None:
        self._api.close()


@pytest.fixture(scope="module", params=["sandbox", pytest.param("cluster", marks=pytest.mark.cluster)])
def target(request: pytest.FixtureRequest) -> Iterator[Target]:
    """One sandbox for the module (each test has its own namespace), loaded with the
    project's CRD; or the real cluster of RATEFIT_CLUSTER_KUBECONFIG."""
    if request.param == "cluster":
        kc = os.environ.get("RATEFIT_CLUSTER_KUBECONFIG")
        if not kc:
            pytest.skip("set RATEFIT_CLUSTER_KUBECONFIG to run against a real cluster")
        t = Target(kubeconfig=kc)
        try:
            yield t
        finally:
            t.close()
        return
    sb = SandboxServer(load=[CRD] if CRD.exists() else ()).start()
    try:
        if not CRD.exists():
            sb.create(MINIMAL_CRD)
        t = Target(sandbox=sb)
        yield t
        t.close()
    finally:
        sb.stop()


class Sleeps(list):
    """An injected sleep: records the waits instead of waiting."""

    def __call__(self, seconds: float) -> None:
        self.append(seconds)


@pytest.fixture
def sleeps() -> Sleeps:
    return Sleeps()


@pytest.fixture
def adapter(target: Target, tmp_path: Path, sleeps: Sleeps) -> Iterator[KubeAdapter]:
    # through a written kubeconfig, as `ratefit run --kubeconfig` does
    kubeconfig = target.write_kubeconfig(tmp_path / "kubeconfig")
    kube = KubeAdapter.from_kubeconfig(str(kubeconfig), identity="ratefit-test-0", sleep=sleeps,
                                       retry=RetryPolicy(max_attempts=4, base_delay=0.5, max_delay=4.0))
    if target.is_sandbox:
        target.sandbox.faults.clear()
    try:
        yield kube
    finally:
        if target.is_sandbox:
            target.sandbox.faults.clear()
        kube.close()


@pytest.fixture
def ns(target: Target) -> Iterator[str]:
    name = f"ratefit-t-{uuid.uuid4().hex[:10]}"
    target.create({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": name}})
    try:
        yield name
    finally:
        target.delete_namespace(name)


@pytest.fixture
def raw(target: Target) -> Iterator[k8s.ApiClient]:
    api = target.api_client()
    try:
        yield api
    finally:
        api.close()


#: an image that runs on a real cluster (the sandbox runs nothing); kept identical in both
PAUSE = "registry.k8s.io/pause:3.10"
PROBE = {"httpGet": {"path": "/healthz", "port": 8080}, "periodSeconds": 10}


def deployment(ns: str, name: str = "web", *, replicas: int = 2, cpu: str = "500m", limit: str | None = "1") -> dict:
    res: dict = {"requests": {"cpu": cpu, "memory": "256Mi"}, "limits": {"memory": "512Mi"}}
    if limit is not None:
        res["limits"]["cpu"] = limit
    return {
        "apiVersion": "apps/v1", "kind": "Deployment",
        "metadata": {"name": name, "namespace": ns, "annotations": {"team": "parcels"}},
        "spec": {
            "replicas": replicas,
            "selector": {"matchLabels": {"app": name}},
            "template": {
                "metadata": {"labels": {"app": name}},
                "spec": {"containers": [
                    {"name": "app", "image": PAUSE, "resources": res,
                     "env": [{"name": "MODE", "value": "prod"}, {"name": "THREADS", "value": "4"}],
                     "readinessProbe": PROBE, "livenessProbe": PROBE,
                     "ports": [{"containerPort": 8080}]},
                    {"name": "sidecar", "image": PAUSE,
                     "resources": {"requests": {"cpu": "100m"}, "limits": {"cpu": "200m"}},
                     "env": [{"name": "UPSTREAM", "value": "127.0.0.1:8080"}]},
                ]},
            },
        },
    }


def policy(ns: str, name: str = "web") -> dict:
    return {
        "apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
        "metadata": {"name": name, "namespace": ns},
        "spec": {"workload": {"kind": "Deployment", "name": "web"}, "mode": "DryRun",
                 "containers": [{"name": "app", "model": f"{ns}/web/app"}]},
    }


def container(dep: dict, name: str) -> dict:
    return next(c for c in dep["spec"]["template"]["spec"]["containers"] if c["name"] == name)


def read_raw(raw: k8s.ApiClient, ns: str, name: str = "web") -> dict:
    return raw.sanitize_for_serialization(k8s.AppsV1Api(raw).read_namespaced_deployment(name, ns))


def patch_requests(target: Target, ns: str) -> list[dict] | None:
    """The PATCH requests the sandbox served in a namespace (None on a real cluster)."""
    if not target.is_sandbox:
        return None
    return [r for r in target.sandbox.requests if r["method"] == "PATCH" and f"/namespaces/{ns}/" in r["path"]]


# ------------------------------------------------------------------ patching the template
def test_patch_touches_only_cpu_after_a_dry_run(target: Target, adapter: KubeAdapter, ns: str,
                                                raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    before = read_raw(raw, ns)
    wl = adapter.read_workload(ns, "Deployment", "web")
    assert wl.container("app").cpu_request_m == 500 and wl.container("app").cpu_limit_m == 1000

    stored = adapter.patch_cpu(wl, {"app": CpuChange(300, limit_m=600)})

    after = read_raw(raw, ns)
    app_b, app_a = container(before, "app"), container(after, "app")
    assert app_a["resources"]["requests"] == {"cpu": "300m", "memory": "256Mi"}
    assert app_a["resources"]["limits"] == {"cpu": "600m", "memory": "512Mi"}
    # strategic merge by `name`: everything else of the container and the other container as they were
    for key in ("env", "readinessProbe", "livenessProbe", "ports", "image"):
        assert app_a[key] == app_b[key], key
    assert container(after, "sidecar") == container(before, "sidecar")
    assert after["spec"]["replicas"] == before["spec"]["replicas"]
    assert after["metadata"]["annotations"]["team"] == "parcels"
    assert after["metadata"]["generation"] == before["metadata"]["generation"] + 1
    assert stored.container("app").cpu_request_m == 300
    assert stored.resource_version == after["metadata"]["resourceVersion"]
    # the server-side dry run went first, then exactly one real patch, both strategic merge
    patches = patch_requests(target, ns)
    if patches is not None:  # the sandbox's request log
        assert [p["query"].get("dryRun") for p in patches] == ["All", None]
        assert all(p["contentType"].startswith("application/strategic-merge-patch+json") for p in patches)


def test_request_above_limit_is_refused_by_the_dry_run(target: Target, adapter: KubeAdapter, ns: str,
                                                       raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, WorkloadKind.DEPLOYMENT, "web")
    with pytest.raises(KubeInvalid) as info:
        adapter.patch_cpu(wl, {"app": CpuChange(1500)})  # limit stays 1 core
    # the API server's wording (DESIGN.md, Kubernetes facts): "must be less than or equal to cpu limit"
    assert "less than or equal to cpu limit" in info.value.server_message
    assert info.value.status == 422
    assert read_raw(raw, ns)["metadata"]["resourceVersion"] == wl.resource_version
    patches = patch_requests(target, ns)
    if patches is not None:
        assert [p["query"].get("dryRun") for p in patches] == ["All"]  # never sent for real


def test_limit_kept_raised_or_dropped(target: Target, adapter: KubeAdapter, ns: str,
                                      raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    wl = adapter.patch_cpu(wl, {"app": CpuChange(400)})  # limits: keep
    assert container(read_raw(raw, ns), "app")["resources"]["limits"]["cpu"] == "1"
    wl = adapter.patch_cpu(wl, {"app": CpuChange(1200, limit_m=2000)})  # keep-ratio: both move
    res = container(read_raw(raw, ns), "app")["resources"]
    assert (res["requests"]["cpu"], res["limits"]["cpu"]) == ("1200m", "2")  # canonical form
    wl = adapter.patch_cpu(wl, {"app": CpuChange(900, drop_limit=True)})  # limits: drop
    res = container(read_raw(raw, ns), "app")["resources"]
    assert "cpu" not in res.get("limits", {}) and res["limits"]["memory"] == "512Mi"
    assert wl.container("app").cpu_limit_m is None


def test_stale_read_gets_conflict_and_nothing_is_overwritten(target: Target, adapter: KubeAdapter,
                                                             ns: str, raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    stale = adapter.read_workload(ns, "Deployment", "web")
    # someone else changes the workload after our read
    k8s.AppsV1Api(raw).patch_namespaced_deployment(
        "web", ns, {"metadata": {"annotations": {"owner": "someone-else"}}})
    with pytest.raises(KubeConflict):
        adapter.patch_cpu(stale, {"app": CpuChange(300)})
    assert container(read_raw(raw, ns), "app")["resources"]["requests"]["cpu"] == "500m"

    # the documented remedy: re-read, recompute, retry
    def attempt():
        return adapter.patch_cpu(adapter.read_workload(ns, "Deployment", "web"), {"app": CpuChange(300)})

    stored = retry_on_conflict(attempt)
    assert stored.container("app").cpu_request_m == 300
    assert stored.annotations["owner"] == "someone-else"


def test_extra_annotations_and_after_dry_run_hook(target: Target, adapter: KubeAdapter, ns: str,
                                                  raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")

    class Stop(Exception):
        pass

    def refuse() -> None:
        raise Stop

    with pytest.raises(Stop):
        adapter.patch_cpu(wl, {"app": CpuChange(300)}, after_dry_run=refuse)
    assert read_raw(raw, ns)["metadata"]["resourceVersion"] == wl.resource_version  # nothing sent
    stored = adapter.patch_cpu(wl, {"app": CpuChange(300)}, annotations={"ratefit.dev/last-change": "T"})
    assert stored.annotations["ratefit.dev/last-change"] == "T"
    assert PREVIOUS_REQUESTS_ANNOTATION in stored.annotations



def test_annotate_workload_touches_metadata_only(target: Target, adapter: KubeAdapter, ns: str,
                                                 raw: k8s.ApiClient) -> None:
    # metadata changes do not move metadata.generation (Kubernetes API conventions:
    # generation tracks the desired state, i.e. spec) — so nothing rolls
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    before = read_raw(raw, ns)
    stored = adapter.annotate_workload(wl, {"ratefit.dev/last-change": "2026-12-01T00:00:00Z"})
    after = read_raw(raw, ns)
    assert stored.annotations["ratefit.dev/last-change"] == "2026-12-01T00:00:00Z"
    assert after["metadata"]["generation"] == before["metadata"]["generation"]
    assert after["spec"]["template"] == before["spec"]["template"]
    with pytest.raises(KubeConflict):  # the read it was given is stale now
        adapter.annotate_workload(wl, {"ratefit.dev/last-change": None})

def test_previous_requests_recorded_once_and_reverted(target: Target, adapter: KubeAdapter, ns: str,
                                                      raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    wl = adapter.patch_cpu(wl, {"app": CpuChange(300, limit_m=600)})
    wl = adapter.patch_cpu(wl, {"app": CpuChange(200, limit_m=400), "sidecar": CpuChange(150)})
    prev = wl.previous_requests
    # the values before ratefit's FIRST change of each container
    assert (prev["app"].cpu_request_m, prev["app"].cpu_limit_m) == (500, 1000)
    assert (prev["sidecar"].cpu_request_m, prev["sidecar"].cpu_limit_m) == (100, 200)

    reverted = adapter.revert(ns, "Deployment", "web")
    assert reverted is not None
    after = read_raw(raw, ns)
    assert container(after, "app")["resources"]["requests"] == {"cpu": "500m", "memory": "256Mi"}
    assert container(after, "app")["resources"]["limits"] == {"cpu": "1", "memory": "512Mi"}
    assert container(after, "sidecar")["resources"] == {"requests": {"cpu": "100m"}, "limits": {"cpu": "200m"}}
    assert PREVIOUS_REQUESTS_ANNOTATION not in (after["metadata"].get("annotations") or {})
    assert after["metadata"]["annotations"]["team"] == "parcels"
    assert adapter.revert(ns, "Deployment", "web") is None  # nothing left to revert


def test_revert_removes_a_request_that_was_not_set(target: Target, adapter: KubeAdapter, ns: str,
                                                   raw: k8s.ApiClient) -> None:
    dep = deployment(ns, limit=None)
    del container(dep, "app")["resources"]["requests"]["cpu"]
    target.create(dep)
    wl = adapter.read_workload(ns, "Deployment", "web")
    assert wl.container("app").cpu_request_m is None
    adapter.patch_cpu(wl, {"app": CpuChange(250)})
    adapter.revert(ns, "Deployment", "web")
    res = container(read_raw(raw, ns), "app")["resources"]
    assert "cpu" not in res.get("requests", {}) and "cpu" not in res.get("limits", {})
    # issue 9: a revert leaves no empty map behind (memory stays where it was set)
    assert res.get("requests") != {} and res.get("limits") != {}


def test_revert_leaves_no_empty_maps_and_no_ratefit_annotations(target: Target, adapter: KubeAdapter, ns: str,
                                                                raw: k8s.ApiClient) -> None:
    dep = deployment(ns, limit=None)
    container(dep, "app")["resources"] = {}
    target.create(dep)
    wl = adapter.read_workload(ns, "Deployment", "web")
    adapter.patch_cpu(wl, {"app": CpuChange(250)}, annotations={"ratefit.dev/last-change": "2026-12-01T00:00:00Z"})
    adapter.revert(ns, "Deployment", "web")
    after = read_raw(raw, ns)
    res = container(after, "app").get("resources") or {}
    assert "requests" not in res and "limits" not in res, res
    annotations = after["metadata"].get("annotations") or {}
    assert "ratefit.dev/last-change" not in annotations and "ratefit.dev/previous-requests" not in annotations


def test_statefulset_read_and_patch(target: Target, adapter: KubeAdapter, ns: str) -> None:
    dep = deployment(ns, "db", replicas=1)
    sts = {**dep, "kind": "StatefulSet", "spec": {**dep["spec"], "serviceName": "db"}}
    target.create(sts)
    wl = adapter.read_workload(ns, "statefulset", "db")
    assert wl.kind is WorkloadKind.STATEFULSET and wl.selector == "app=db"
    stored = adapter.patch_cpu(wl, {"app": CpuChange(700)})
    assert stored.container("app").cpu_request_m == 700
    assert [w.name for w in adapter.list_workloads("StatefulSet", namespace=ns)] == ["db"]


def test_missing_workload_is_not_found(adapter: KubeAdapter, ns: str) -> None:
    with pytest.raises(KubeNotFound):
        adapter.read_workload(ns, "Deployment", "nope")


# ------------------------------------------------------------------ pods, in-place resize, HPAs
def test_pods_listed_and_resized_in_place_one_at_a_time(target: Target, adapter: KubeAdapter, ns: str,
                                                        raw: k8s.ApiClient) -> None:
    target.create(deployment(ns, replicas=3))
    target.wait_for_pods(ns, "app=web", 3)
    wl = adapter.read_workload(ns, "Deployment", "web")
    pods = adapter.list_pods(wl)
    assert len(pods) == 3 and all(p.containers[0].cpu_request_m == 500 for p in pods)

    outcomes = adapter.resize_pods(pods, {"app": CpuChange(400, limit_m=800)})
    assert [o.ok for o in outcomes] == [True, True, True]
    core = k8s.CoreV1Api(raw)
    for p in pods:
        spec = raw.sanitize_for_serialization(core.read_namespaced_pod(p.name, ns))["spec"]
        res = next(c for c in spec["containers"] if c["name"] == "app")["resources"]
        assert (res["requests"]["cpu"], res["limits"]["cpu"]) == ("400m", "800m")
    # per pod a dry run, then one real request, to the resize subresource, in order;
    # the template is left as it was
    patches = patch_requests(target, ns)
    if patches is not None:
        resizes = [(r["path"].split("/")[-2], r["query"].get("dryRun")) for r in patches if r["path"].endswith("/resize")]
        names = [p.name for p in pods]
        assert resizes == [(n, "All") for n in names] + [(n, None) for n in names]
    assert adapter.read_workload(ns, "Deployment", "web").container("app").cpu_request_m == 500
    # the actual values (status.containerStatuses[].resources) follow: at once in the
    # sandbox, when the kubelet has applied the resize on a real cluster
    deadline = time.monotonic() + (0 if target.is_sandbox else 120)
    while True:
        again = adapter.list_pods(wl)
        if all(p.containers[0].cpu_request_m == 400 for p in again) or time.monotonic() > deadline:
            break
        time.sleep(2)
    assert all(p.containers[0].cpu_request_m == 400 for p in again)


def test_resize_stops_at_the_first_refusal(target: Target, adapter: KubeAdapter, ns: str) -> None:
    target.create(deployment(ns, replicas=3))
    target.wait_for_pods(ns, "app=web", 3)
    pods = adapter.list_pods(adapter.read_workload(ns, "Deployment", "web"))
    before = [p.resource_version for p in pods]
    outcomes = adapter.resize_pods(pods, {"app": CpuChange(2000)})  # above the 1-core limit
    assert outcomes[0].ok is False and outcomes[0].error_kind == "KubeInvalid"
    assert "less than or equal to cpu limit" in (outcomes[0].error or "")
    assert [o.error_kind for o in outcomes[1:]] == ["Skipped", "Skipped"]
    assert [p.resource_version for p in adapter.list_pods(adapter.read_workload(ns, "Deployment", "web"))] == before

    # without the dry run the real resizes also stop at the first refusal
    outcomes = adapter.resize_pods(pods, {"app": CpuChange(2000)}, dry_run_first=False)
    assert [o.error_kind for o in outcomes] == ["KubeInvalid", "Skipped", "Skipped"]
    with pytest.raises(Exception, match="cannot remove a CPU limit"):
        adapter.resize_pods(pods, {"app": CpuChange(100, drop_limit=True)})


def test_hpas_targeting_the_workload(target: Target, adapter: KubeAdapter, ns: str) -> None:
    target.create(deployment(ns))
    target.create(deployment(ns, "other"))

    def hpa(name: str, target: str, metrics: list) -> dict:
        return {"apiVersion": "autoscaling/v2", "kind": "HorizontalPodAutoscaler",
                "metadata": {"name": name, "namespace": ns},
                "spec": {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment", "name": target},
                         "minReplicas": 1, "maxReplicas": 5, "metrics": metrics}}

    target.create(hpa("web-cpu", "web", [{"type": "Resource", "resource": {
        "name": "cpu", "target": {"type": "Utilization", "averageUtilization": 70}}}]))
    target.create(hpa("other-mem", "other", [{"type": "Resource", "resource": {
        "name": "memory", "target": {"type": "Utilization", "averageUtilization": 70}}}]))
    web = adapter.find_hpas(adapter.read_workload(ns, "Deployment", "web"))
    assert [(h.name, h.scales_on_cpu_utilization) for h in web] == [("web-cpu", True)]
    other = adapter.find_hpas(adapter.read_workload(ns, "Deployment", "other"))
    assert [(h.name, h.scales_on_cpu_utilization) for h in other] == [("other-mem", False)]


# ------------------------------------------------------------------ events and status
def test_event_written_with_the_events_v1_fields(target: Target, adapter: KubeAdapter, ns: str,
                                                 raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    name = adapter.emit_event(regarding=wl.ref, reason="CpuRequestChanged", action="Patch",
                              note="app: 500m -> 300m at 42 req/s", type=EventType.NORMAL)
    ev = raw.sanitize_for_serialization(k8s.EventsV1Api(raw).read_namespaced_event(name, ns))
    assert ev["reason"] == "CpuRequestChanged" and ev["action"] == "Patch" and ev["type"] == "Normal"
    assert ev["reportingController"] == REPORTING_CONTROLLER and ev["reportingInstance"] == "ratefit-test-0"
    assert ev["regarding"]["kind"] == "Deployment" and ev["regarding"]["name"] == "web"
    assert ev["regarding"]["uid"] == wl.uid
    # eventTime is a MicroTime: RFC 3339 with microseconds (metav1.MicroTime)
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}(Z|\+00:00)", str(ev["eventTime"]))
    with pytest.raises(Exception, match="UpperCamelCase"):
        adapter.emit_event(regarding=wl.ref, reason="cpu changed", action="Patch", note="x")


def test_status_written_through_subresource_without_moving_generation(
        target: Target, adapter: KubeAdapter, ns: str) -> None:
    target.create(policy(ns))
    before = adapter.read_policy(ns, "web")
    status = {"observedGeneration": before.generation, "conditions": [{
        "type": "Ready", "status": "True", "reason": "Sized", "message": "ok",
        "lastTransitionTime": "2026-01-01T00:00:00Z", "observedGeneration": before.generation}],
        "containers": [{"name": "app", "current": "500m", "newRequest": "300m", "verdict": "Proposed",
                        "reason": "NewTarget"}]}
    after = adapter.write_policy_status(ns, "web", status, resource_version=before.resource_version)
    assert after.status["containers"][0]["newRequest"] == "300m"
    assert after.generation == before.generation  # status writes never bump generation
    assert after.spec == before.spec
    assert adapter.read_policy(ns, "web").status["conditions"][0]["reason"] == "Sized"
    with pytest.raises(KubeConflict):  # the stale resourceVersion precondition holds
        adapter.write_policy_status(ns, "web", status, resource_version=before.resource_version)


def test_list_policies_by_namespace_and_all(target: Target, adapter: KubeAdapter, ns: str) -> None:
    target.create(policy(ns, "a"))
    target.create(policy(ns, "b"))
    mine = adapter.list_policies([ns])
    assert sorted(p.name for p in mine.items) == ["a", "b"] and mine.resource_version
    everywhere = adapter.list_policies()
    assert {("a", ns), ("b", ns)} <= {(p.name, p.namespace) for p in everywhere.items}


def test_watch_sees_added_and_modified(target: Target, adapter: KubeAdapter, ns: str,
                                                   raw: k8s.ApiClient) -> None:
    events: queue.Queue = queue.Queue()
    stop = threading.Event()

    def run() -> None:
        for ev in adapter.watch_policies(namespace=ns, timeout_seconds=1, stop=stop):
            events.put(ev)

    t = threading.Thread(target=run, daemon=True)
    t.start()
    try:
        first = events.get(timeout=10)
        assert first.type == "RELISTED" and first.listed is not None and first.listed.items == ()
        target.create(policy(ns))
        added = events.get(timeout=10)
        assert added.type == "ADDED" and added.policy.name == "web"
        k8s.CustomObjectsApi(raw).patch_namespaced_custom_object(
            "ratefit.dev", "v1alpha1", ns, "sizingpolicies", "web", {"spec": {"mode": "Apply"}})
        modified = events.get(timeout=10)
        assert modified.type == "MODIFIED" and modified.policy.spec["mode"] == "Apply"
    finally:
        stop.set()
        t.join(timeout=15)
    assert not t.is_alive()


def test_watch_relists_after_gone(target: Target, adapter: KubeAdapter, ns: str) -> None:
    # a resourceVersion the server no longer keeps: 410 Gone → the adapter lists again
    target.create(policy(ns, "web"))
    target.create(policy(ns, "later"))
    target.sandbox.store.compact()  # forget the change history, as etcd compaction does
    gen = adapter.watch_policies(namespace=ns, resource_version="1", timeout_seconds=2)
    ev = next(gen)
    gen.close()
    assert ev.type == "RELISTED" and sorted(p.name for p in ev.listed.items) == ["later", "web"]


def test_watch_recovers_from_a_dropped_stream(target: Target, adapter: KubeAdapter, ns: str) -> None:
    listed = adapter.list_policies([ns])
    target.sandbox.faults.add("GET", f"/namespaces/{ns}/sizingpolicies", drop_watch=True, count=1)
    target.create(policy(ns, "one"))
    target.create(policy(ns, "two"))
    gen = adapter.watch_policies(namespace=ns, resource_version=listed.resource_version, timeout_seconds=2)
    seen = []
    for ev in gen:
        if ev.type == "ADDED":
            seen.append(ev.policy.name)
        if len(seen) == 2:
            break
    gen.close()
    assert seen == ["one", "two"]  # each change once, in order, across the reconnect
    watches = [r for r in target.sandbox.requests
               if r["path"].endswith(f"/namespaces/{ns}/sizingpolicies") and r["query"].get("watch")]
    assert len(watches) >= 2  # the first stream was cut off and the adapter reopened it


# ------------------------------------------------------------------ retries
def test_429_retry_after_is_honoured(target: Target, adapter: KubeAdapter, ns: str,
                                     sleeps: Sleeps) -> None:
    target.create(deployment(ns))
    target.sandbox.faults.add("GET", f"/namespaces/{ns}/deployments/web$", status=429, retry_after=3, count=2)
    wl = adapter.read_workload(ns, "Deployment", "web")
    assert wl.name == "web"
    assert sleeps == [3, 3]  # RFC 9110 §10.2.3 / the API server's Retry-After, not our own backoff


def test_500_backs_off_with_capped_jitter_then_succeeds(target: Target, adapter: KubeAdapter, ns: str,
                                                        sleeps: Sleeps, raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    # the real (non-dry-run) patch fails twice with 500, then goes through exactly once
    target.sandbox.faults.add("PATCH", f"/namespaces/{ns}/deployments/web$", status=500, count=1)
    adapter.patch_cpu(wl, {"app": CpuChange(300)})
    assert len(sleeps) == 1 and 0 <= sleeps[0] <= 0.5  # full jitter, attempt 0: U(0, base)
    assert container(read_raw(raw, ns), "app")["resources"]["requests"]["cpu"] == "300m"
    assert read_raw(raw, ns)["metadata"]["generation"] == 2  # one template change, not two


def test_unavailable_after_the_attempts_run_out(target: Target, adapter: KubeAdapter, ns: str,
                                                sleeps: Sleeps) -> None:
    target.create(deployment(ns))
    target.sandbox.faults.add("GET", f"/namespaces/{ns}/deployments/web$", status=503, count=None)
    with pytest.raises(KubeUnavailable) as info:
        adapter.read_workload(ns, "Deployment", "web")
    assert info.value.status == 503 and len(sleeps) == 3  # 4 attempts → 3 waits
    assert all(0 <= s <= 4.0 for s in sleeps)


def test_injected_conflict_is_handed_to_the_caller(target: Target, adapter: KubeAdapter, ns: str,
                                                   raw: k8s.ApiClient) -> None:
    target.create(deployment(ns))
    target.sandbox.faults.add("PATCH", f"/namespaces/{ns}/deployments/web$", conflict=True, count=1)
    calls = []

    def attempt():
        calls.append(1)
        return adapter.patch_cpu(adapter.read_workload(ns, "Deployment", "web"), {"app": CpuChange(300)})

    stored = retry_on_conflict(attempt, attempts=3)
    assert len(calls) == 2 and stored.container("app").cpu_request_m == 300
    assert read_raw(raw, ns)["metadata"]["generation"] == 2


# ------------------------------------------------------------------ leader election
class Clock:
    def __init__(self, t: float = 1_800_000_000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_lease_taken_over_only_after_expiry(target: Target, adapter: KubeAdapter, ns: str,
                                            raw: k8s.ApiClient) -> None:
    clock = Clock()
    a = adapter.leader_elector(namespace=ns, name="ratefit", clock=clock)
    other = KubeAdapter(target.api_client(), identity="ratefit-test-1")
    b = other.leader_elector(namespace=ns, name="ratefit", clock=clock)
    try:
        assert a.try_acquire_or_renew() and a.is_leader
        assert not b.try_acquire_or_renew() and not b.is_leader
        lease = raw.sanitize_for_serialization(k8s.CoordinationV1Api(raw).read_namespaced_lease("ratefit", ns))
        assert lease["spec"]["holderIdentity"] == "ratefit-test-0"
        assert lease["spec"]["leaseDurationSeconds"] == 15 and lease["spec"]["leaseTransitions"] == 0

        clock.t += 8
        assert a.try_acquire_or_renew()  # t=8: renewals keep it
        clock.t += 1
        assert not b.try_acquire_or_renew()  # t=9: B sees the renewed record (its observedTime)
        # A stops renewing (crashed); its own view lapses at the renew deadline (10 s)
        clock.t += 11
        assert not a.is_leader  # t=20: 12 s since A's last renewal
        assert not b.try_acquire_or_renew()  # t=20: 11 s since B saw a change: still live
        clock.t += 5
        assert b.try_acquire_or_renew() and b.is_leader  # t=25: 16 s > 15 s without a change: expired
        lease = raw.sanitize_for_serialization(k8s.CoordinationV1Api(raw).read_namespaced_lease("ratefit", ns))
        assert lease["spec"]["holderIdentity"] == "ratefit-test-1" and lease["spec"]["leaseTransitions"] == 1
        assert not a.try_acquire_or_renew()  # the old holder comes back and finds a live lease

        b.release()  # clean shutdown clears holderIdentity: no waiting for expiry
        assert not b.is_leader
        assert a.try_acquire_or_renew() and a.is_leader
    finally:
        other.close()


def test_lease_race_has_one_winner(target: Target, adapter: KubeAdapter, ns: str,
                                   raw: k8s.ApiClient) -> None:
    clock = Clock()
    # a Lease left behind by a replica that died
    target.create({"apiVersion": "coordination.k8s.io/v1", "kind": "Lease",
                    "metadata": {"name": "race", "namespace": ns},
                    "spec": {"holderIdentity": "gone", "leaseDurationSeconds": 15, "leaseTransitions": 3,
                             "renewTime": "2020-01-01T00:00:00.000000Z"}})
    a = adapter.leader_elector(namespace=ns, name="race", clock=clock)
    other = KubeAdapter(target.api_client(), identity="ratefit-test-1")
    b = other.leader_elector(namespace=ns, name="race", clock=clock)
    try:
        assert not a.try_acquire_or_renew() and not b.try_acquire_or_renew()  # both wait one duration
        clock.t += 16
        # B reads the expired Lease; before B writes, A takes it; B's write carries the
        # resourceVersion it read → 409 from the server → B stays a follower
        real_get = b._get

        def read_then_a_wins():
            lease = real_get()
            assert a.try_acquire_or_renew()
            return lease

        b._get = read_then_a_wins  # type: ignore[method-assign]
        assert not b.try_acquire_or_renew() and not b.is_leader
        b._get = real_get  # type: ignore[method-assign]
        assert a.is_leader
        spec = raw.sanitize_for_serialization(k8s.CoordinationV1Api(raw).read_namespaced_lease("race", ns))["spec"]
        assert spec["holderIdentity"] == "ratefit-test-0" and spec["leaseTransitions"] == 4
        assert not b.try_acquire_or_renew()
    finally:
        other.close()


def test_bad_kubeconfig_is_an_input_error(tmp_path: Path) -> None:
    from ratefit.models.errors import InputError

    missing = tmp_path / "nope"
    with pytest.raises(InputError, match="--kubeconfig"):
        KubeAdapter.from_kubeconfig(str(missing))
    garbage = tmp_path / "garbage"
    garbage.write_text("clusters: 3\n")
    with pytest.raises(InputError):
        KubeAdapter.from_kubeconfig(str(garbage))


def test_a_lost_answer_never_doubles_a_change(target: Target, adapter: KubeAdapter, ns: str,
                                              raw: k8s.ApiClient) -> None:
    """The real patch lands but its answer is lost (connection reset after the server
    applied it): the retry carries the same resourceVersion precondition, so the server
    refuses it with 409 instead of applying the change a second time."""
    from urllib3.exceptions import ProtocolError

    target.create(deployment(ns))
    wl = adapter.read_workload(ns, "Deployment", "web")
    real = adapter._apps.patch_namespaced_deployment
    lost = []

    def answer_lost_once(*args, **kwargs):
        resp = real(*args, **kwargs)
        if kwargs.get("dry_run") is None and not lost:
            lost.append(1)
            resp.release_conn()
            raise ProtocolError("Connection aborted.", ConnectionResetError(104, "Connection reset by peer"))
        return resp

    adapter._apps.patch_namespaced_deployment = answer_lost_once  # type: ignore[method-assign]
    with pytest.raises(KubeConflict):
        adapter.patch_cpu(wl, {"app": CpuChange(300)})
    after = read_raw(raw, ns)
    assert after["metadata"]["generation"] == 2  # applied exactly once
    assert container(after, "app")["resources"]["requests"]["cpu"] == "300m"
    # the caller's re-read sees the change is already there: nothing left to do
    assert adapter.read_workload(ns, "Deployment", "web").container("app").cpu_request_m == 300
