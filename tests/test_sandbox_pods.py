"""Pods in the sandbox: the `resize` subresource, pod immutability, QoS, deletion and
the built-in rollout's replacement of pods — through the official client over HTTP.

Sources: Kubernetes docs "Resize CPU and Memory Resources assigned to Containers"
(in-place resize via the `resize` subresource; only CPU and memory; the QoS class may
not change; actual values in status.containerStatuses[].resources), "Pod Quality of
Service Classes", API reference "Pod" (SetDefaults_Pod: a limit without a request
defaults the request), "Garbage Collection" (owner references, cascading deletion).
"""

from __future__ import annotations

import json

import pytest
from kubernetes import client
from kubernetes.client.rest import ApiException

NS = "default"


def pod(name: str = "worker-0", *, cpu_req: str = "250m", cpu_lim: str = "500m",
        mem: str = "128Mi", restart_cpu: bool = False) -> dict:
    c = {"name": "main", "image": "registry.example/worker:7",
         "resources": {"requests": {"cpu": cpu_req, "memory": mem},
                       "limits": {"cpu": cpu_lim, "memory": mem}},
         "env": [{"name": "SHARD", "value": "3"}]}
    if restart_cpu:
        c["resizePolicy"] = [{"resourceName": "cpu", "restartPolicy": "RestartContainer"}]
    return {"apiVersion": "v1", "kind": "Pod",
            "metadata": {"name": name, "labels": {"app": "worker"}},
            "spec": {"containers": [c, {"name": "log", "image": "registry.example/log:1"}]}}


@pytest.fixture
def core(sandbox_api) -> client.CoreV1Api:
    return client.CoreV1Api(sandbox_api)


def resize_body(cpu_req: str, cpu_lim: str | None = None) -> dict:
    res: dict = {"requests": {"cpu": cpu_req}}
    if cpu_lim:
        res["limits"] = {"cpu": cpu_lim}
    return {"spec": {"containers": [{"name": "main", "resources": res}]}}


def test_pod_runs_at_once_with_qos_and_defaults(core) -> None:
    created = core.create_namespaced_pod(NS, pod())
    assert created.status.phase == "Running"          # no kubelet: a stand-in
    assert created.status.qos_class == "Burstable"    # requests < limits (QoS docs)
    lim_only = pod("g")
    lim_only["spec"]["containers"] = [{"name": "main", "image": "x:1", "resources": {
        "limits": {"cpu": "1", "memory": "1Gi"}}}]
    g = core.create_namespaced_pod(NS, lim_only)
    # SetDefaults_Pod: requests default to limits -> Guaranteed (QoS docs)
    assert g.spec.containers[0].resources.requests == {"cpu": "1", "memory": "1Gi"}
    assert g.status.qos_class == "Guaranteed"


def test_resize_changes_only_resources_and_reports_them(core, sandbox) -> None:
    core.create_namespaced_pod(NS, pod())
    before = sandbox.store.get("", "pods", NS, "worker-0")
    out = core.patch_namespaced_pod_resize("worker-0", NS, resize_body("400m"))
    main = out.spec.containers[0]
    assert main.resources.requests == {"cpu": "400m", "memory": "128Mi"}
    assert main.resources.limits == {"cpu": "500m", "memory": "128Mi"}
    assert main.env[0].value == "3" and out.spec.containers[1].name == "log"
    # resize docs: the applied values show in status.containerStatuses[].resources
    st = {s.name: s for s in out.status.container_statuses}
    assert st["main"].resources.requests["cpu"] == "400m"
    assert st["main"].restart_count == 0
    assert out.metadata.generation == before["metadata"]["generation"] + 1
    assert out.metadata.uid == before["metadata"]["uid"]     # same pod, not replaced


def test_resize_ignores_other_fields(core, sandbox) -> None:
    core.create_namespaced_pod(NS, pod())
    body = resize_body("300m")
    body["spec"]["containers"][0]["image"] = "registry.example/worker:8"
    body["metadata"] = {"labels": {"hacked": "yes"}}
    core.patch_namespaced_pod_resize("worker-0", NS, body)
    stored = sandbox.store.get("", "pods", NS, "worker-0")
    assert stored["spec"]["containers"][0]["image"] == "registry.example/worker:7"
    assert "hacked" not in stored["metadata"]["labels"]
    assert stored["spec"]["containers"][0]["resources"]["requests"]["cpu"] == "300m"


def test_resize_restart_policy_restarts_the_container(core) -> None:
    core.create_namespaced_pod(NS, pod(restart_cpu=True))
    out = core.patch_namespaced_pod_resize("worker-0", NS, resize_body("300m"))
    st = {s.name: s for s in out.status.container_statuses}
    # resize docs: resizePolicy RestartContainer restarts the container to apply the change
    assert st["main"].restart_count == 1 and st["log"].restart_count == 0


@pytest.mark.parametrize(("body", "fragment"), [
    (resize_body("600m"), "must be less than or equal to cpu limit of 500m"),
    ({"spec": {"containers": [{"name": "main", "resources": {
        "requests": {"cpu": "250m", "memory": "128Mi", "ephemeral-storage": "1Gi"},
        "limits": {"cpu": "500m", "memory": "128Mi"}}}]}}, "only cpu and memory"),
])
def test_resize_rejections(core, sandbox, body, fragment) -> None:
    core.create_namespaced_pod(NS, pod())
    rv = sandbox.store.get("", "pods", NS, "worker-0")["metadata"]["resourceVersion"]
    with pytest.raises(ApiException) as err:
        core.patch_namespaced_pod_resize("worker-0", NS, body)
    assert err.value.status == 422
    assert fragment in json.loads(err.value.body)["message"]
    assert sandbox.store.get("", "pods", NS, "worker-0")["metadata"]["resourceVersion"] == rv


def test_resize_may_not_change_qos_class(core) -> None:
    g = pod("g", cpu_req="1", cpu_lim="1")
    g["spec"]["containers"] = g["spec"]["containers"][:1]   # every container limited
    core.create_namespaced_pod(NS, g)
    assert core.read_namespaced_pod("g", NS).status.qos_class == "Guaranteed"
    with pytest.raises(ApiException) as err:   # request below limit would make it Burstable
        core.patch_namespaced_pod_resize("g", NS, resize_body("500m"))
    # resize docs: "the QoS class of a Pod cannot be changed by resizing"
    assert err.value.status == 422
    assert "QOS Class may not change" in json.loads(err.value.body)["message"]
    ok = core.patch_namespaced_pod_resize("g", NS, resize_body("750m", "750m"))
    assert ok.status.qos_class == "Guaranteed"


def test_resources_of_a_running_pod_change_only_through_resize(core) -> None:
    core.create_namespaced_pod(NS, pod())
    with pytest.raises(ApiException) as err:
        core.patch_namespaced_pod("worker-0", NS, resize_body("300m"))
    # ValidatePodUpdate: pod spec is immutable apart from images and a few fields
    assert err.value.status == 422
    assert "pod updates may not change fields" in json.loads(err.value.body)["message"]
    img = core.patch_namespaced_pod("worker-0", NS, {"spec": {"containers": [
        {"name": "main", "image": "registry.example/worker:8"}]}})
    assert img.spec.containers[0].image == "registry.example/worker:8"


def test_deleted_deployment_pod_is_replaced_and_cascade(sandbox_api, core, sandbox) -> None:
    apps = client.AppsV1Api(sandbox_api)
    apps.create_namespaced_deployment(NS, {
        "metadata": {"name": "api"},
        "spec": {"replicas": 2, "selector": {"matchLabels": {"app": "api"}},
                 "template": {"metadata": {"labels": {"app": "api"}},
                              "spec": {"containers": [{"name": "c", "image": "i:1"}]}}}})
    names = {p.metadata.name for p in core.list_namespaced_pod(NS, label_selector="app=api").items}
    victim = sorted(names)[0]
    core.delete_namespaced_pod(victim, NS)
    after = {p.metadata.name for p in core.list_namespaced_pod(NS, label_selector="app=api").items}
    assert len(after) == 2 and victim not in after   # the ReplicaSet replaced it
    apps.delete_namespaced_deployment("api", NS)
    # Garbage collection docs: dependents (ReplicaSets, then pods) go with their owner
    assert core.list_namespaced_pod(NS, label_selector="app=api").items == []
    assert sandbox.store.list("apps", "replicasets", NS) == []


def test_statefulset_template_change_replaces_pods(sandbox_api, core) -> None:
    apps = client.AppsV1Api(sandbox_api)
    sts = {"metadata": {"name": "db"},
           "spec": {"replicas": 3, "serviceName": "db", "selector": {"matchLabels": {"app": "db"}},
                    "template": {"metadata": {"labels": {"app": "db"}}, "spec": {"containers": [
                        {"name": "c", "image": "i:1",
                         "resources": {"requests": {"cpu": "100m"}}}]}}}}
    apps.create_namespaced_stateful_set(NS, sts)
    old = {p.metadata.name: p.metadata.uid
           for p in core.list_namespaced_pod(NS, label_selector="app=db").items}
    apps.patch_namespaced_stateful_set("db", NS, {"spec": {"template": {"spec": {"containers": [
        {"name": "c", "resources": {"requests": {"cpu": "200m"}}}]}}}})
    new = core.list_namespaced_pod(NS, label_selector="app=db").items
    assert sorted(p.metadata.name for p in new) == ["db-0", "db-1", "db-2"]
    assert all(p.metadata.uid != old[p.metadata.name] for p in new)
    assert {p.spec.containers[0].resources.requests["cpu"] for p in new} == {"200m"}
    s = apps.read_namespaced_stateful_set("db", NS).status
    assert s.observed_generation == 2 and s.updated_replicas == 3
    assert s.current_revision == s.update_revision


def test_resize_beyond_the_node_is_infeasible(core, sandbox) -> None:
    node = core.read_node("sandbox-node")
    assert node.status.allocatable["cpu"] == "16"
    core.create_namespaced_pod(NS, pod(cpu_lim="64"))
    out = core.patch_namespaced_pod_resize("worker-0", NS, resize_body("32"))
    # resize docs: a resize the node can never fit stays desired in spec, the pod keeps
    # running with its old resources, condition PodResizePending reason Infeasible
    assert out.spec.containers[0].resources.requests["cpu"] == "32"
    st = {s.name: s for s in out.status.container_statuses}
    assert st["main"].resources.requests["cpu"] == "250m"
    cond = [c for c in out.status.conditions if c.type == "PodResizePending"]
    assert len(cond) == 1 and cond[0].reason == "Infeasible" and cond[0].status == "True"
    ok = core.patch_namespaced_pod_resize("worker-0", NS, resize_body("2"))
    assert not [c for c in ok.status.conditions if c.type == "PodResizePending"]
    assert {s.name: s for s in ok.status.container_statuses}["main"].resources.requests[
        "cpu"] == "2"


@pytest.fixture
def slow_sandbox(request):
    """A sandbox whose pods take `request.param` seconds (default 0.2) to become Ready."""
    from ratefit.controller.sandbox.server import SandboxServer

    sb = SandboxServer(startup_seconds=getattr(request, "param", 0.2),
                       bookmark_interval=0.2).start()
    try:
        yield sb
    finally:
        sb.stop()


def _wait(cond, timeout: float = 10.0) -> None:
    import time

    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise AssertionError("condition not reached in time")
        time.sleep(0.02)


@pytest.mark.parametrize("slow_sandbox", [1.0], indirect=True)   # room for the mid-rollout read
def test_startup_delay_deployment_rollout_surges_then_scales_down(slow_sandbox) -> None:
    api = slow_sandbox.api_client()
    apps, core = client.AppsV1Api(api), client.CoreV1Api(api)
    apps.create_namespaced_deployment(NS, {
        "metadata": {"name": "api"},
        "spec": {"replicas": 2, "selector": {"matchLabels": {"app": "api"}},
                 "template": {"metadata": {"labels": {"app": "api"}}, "spec": {"containers": [
                     {"name": "c", "image": "i:1", "resources": {"requests": {"cpu": "100m"}}}]}}}})
    first = core.list_namespaced_pod(NS, label_selector="app=api").items
    assert {p.status.phase for p in first} == {"Pending"}   # containers still starting
    _wait(lambda: (apps.read_namespaced_deployment("api", NS).status.available_replicas
                   or 0) == 2)
    old = {p.metadata.name for p in core.list_namespaced_pod(NS, label_selector="app=api").items}
    apps.patch_namespaced_deployment("api", NS, {"spec": {"template": {"spec": {"containers": [
        {"name": "c", "resources": {"requests": {"cpu": "200m"}}}]}}}})
    mid = apps.read_namespaced_deployment("api", NS).status
    # Deployment docs (rolling update, "Progressing"): during the rollout the old pods keep
    # serving while new ones start; the condition says ReplicaSetUpdated
    assert mid.updated_replicas == 2 and mid.replicas == 4 and mid.ready_replicas == 2
    prog = {c.type: c for c in mid.conditions}["Progressing"]
    assert prog.reason == "ReplicaSetUpdated"
    pods = core.list_namespaced_pod(NS, label_selector="app=api").items
    assert old <= {p.metadata.name for p in pods}
    _wait(lambda: {c.type: c.reason for c in apps.read_namespaced_deployment(
        "api", NS).status.conditions}["Progressing"] == "NewReplicaSetAvailable")
    done = core.list_namespaced_pod(NS, label_selector="app=api").items
    assert len(done) == 2 and not old & {p.metadata.name for p in done}
    assert {p.spec.containers[0].resources.requests["cpu"] for p in done} == {"200m"}
    api.close()


def test_startup_delay_statefulset_replaces_highest_ordinal_first(slow_sandbox) -> None:
    api = slow_sandbox.api_client()
    apps = client.AppsV1Api(api)
    apps.create_namespaced_stateful_set(NS, {
        "metadata": {"name": "db"},
        "spec": {"replicas": 3, "serviceName": "db", "selector": {"matchLabels": {"app": "db"}},
                 "template": {"metadata": {"labels": {"app": "db"}}, "spec": {"containers": [
                     {"name": "c", "image": "i:1"}]}}}})
    _wait(lambda: (apps.read_namespaced_stateful_set("db", NS).status.ready_replicas or 0)
          == 3)
    start = slow_sandbox.store.resource_version
    apps.patch_namespaced_stateful_set("db", NS, {"spec": {"template": {"metadata": {
        "annotations": {"rev": "2"}}}}})
    _wait(lambda: apps.read_namespaced_stateful_set("db", NS).status.updated_replicas == 3
          and apps.read_namespaced_stateful_set("db", NS).status.ready_replicas == 3)
    deleted = [c.obj["metadata"]["name"] for c in slow_sandbox.store.changes_after(start)
               if c.key == ("", "pods") and c.type == "DELETED"]
    # StatefulSet docs (RollingUpdate): pods are updated one at a time, from the highest
    # ordinal to the lowest, each waiting for the previous one to be Running and Ready
    assert deleted == ["db-2", "db-1", "db-0"]
    st = apps.read_namespaced_stateful_set("db", NS).status
    assert st.current_revision == st.update_revision
    api.close()


def test_startup_delay_resize_is_in_progress_then_done(slow_sandbox) -> None:
    api = slow_sandbox.api_client()
    core = client.CoreV1Api(api)
    core.create_namespaced_pod(NS, pod(restart_cpu=True))
    _wait(lambda: core.read_namespaced_pod("worker-0", NS).status.phase == "Running")
    out = core.patch_namespaced_pod_resize("worker-0", NS, resize_body("400m"))
    # resize docs: while the kubelet actuates a resize the pod has PodResizeInProgress;
    # status.containerStatuses[].resources shows the values in effect, allocatedResources
    # what was admitted
    assert "PodResizeInProgress" in [c.type for c in out.status.conditions]
    main = {s.name: s for s in out.status.container_statuses}["main"]
    assert main.resources.requests["cpu"] == "250m"
    assert main.allocated_resources["cpu"] == "400m"
    _wait(lambda: "PodResizeInProgress" not in [
        c.type for c in core.read_namespaced_pod("worker-0", NS).status.conditions])
    done = {s.name: s for s in core.read_namespaced_pod("worker-0", NS).status.container_statuses}
    assert done["main"].resources.requests["cpu"] == "400m" and done["main"].restart_count == 1
    assert done["log"].restart_count == 0
    api.close()
