"""The sandbox API server against the official `kubernetes` Python client over real HTTP.

Expected behaviour is the Kubernetes API's documented behaviour; each check names
its source. Sources: Kubernetes docs "API Concepts" (resourceVersion, watch, 410
Gone, dry-run), "Update API Objects in Place Using kubectl patch" (strategic merge,
JSON merge patch), RFC 7386 (JSON merge patch), RFC 6902 (JSON patch), the Kubernetes
source `pkg/apis/core/validation/validation.go` (request ≤ limit message),
apimachinery `api/errors` (Status reasons), "Extend the Kubernetes API with
CustomResourceDefinitions" (schemas, defaults, status subresource, generation).
"""

from __future__ import annotations

import copy
import json
from typing import Any

import pytest
from kubernetes import client, watch
from kubernetes.client.rest import ApiException
from kubernetes.utils import parse_quantity

NS = "default"


def deployment(name: str = "web", *, replicas: int = 2) -> dict[str, Any]:
    """A two-container Deployment of the invented scenario used across these tests."""
    return {
        "apiVersion": "apps/v1",
        "kind": "Deployment",
        "metadata": {"name": name, "labels": {"app": name}},
        "spec": {
            "replicas": replicas,
            "selector": {"matchLabels": {"app": name}},
            "template": {
                "metadata": {"labels": {"app": name, "tier": "front"}},
                "spec": {"containers": [
                    {"name": "app", "image": "registry.example/web:1.4",
                     "env": [{"name": "MODE", "value": "fast"}, {"name": "LEVEL", "value": "2"}],
                     "ports": [{"containerPort": 8080, "name": "http"}],
                     "readinessProbe": {"httpGet": {"path": "/ready", "port": 8080},
                                        "periodSeconds": 5},
                     "resources": {"requests": {"cpu": "0.5", "memory": "256Mi"},
                                   "limits": {"cpu": "1", "memory": "512Mi"}}},
                    {"name": "sidecar", "image": "registry.example/proxy:2",
                     "resources": {"requests": {"cpu": "100m"}, "limits": {"cpu": "200m"}}},
                ]},
            },
        },
    }


@pytest.fixture
def apps(sandbox_api: client.ApiClient) -> client.AppsV1Api:
    return client.AppsV1Api(sandbox_api)


@pytest.fixture
def core(sandbox_api: client.ApiClient) -> client.CoreV1Api:
    return client.CoreV1Api(sandbox_api)


@pytest.fixture
def custom(sandbox_api: client.ApiClient) -> client.CustomObjectsApi:
    return client.CustomObjectsApi(sandbox_api)


def status_of(exc: ApiException) -> dict[str, Any]:
    return json.loads(exc.body)


# --- strategic merge patch ------------------------------------------------------------

def test_strategic_merge_patch_of_one_container_leaves_the_rest(apps, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    before = sandbox.store.get("apps", "deployments", NS, "web")
    # Kubernetes docs "Update API Objects in Place Using kubectl patch": under a strategic
    # merge patch, containers merge by their `name` (patchMergeKey), other fields are kept.
    patched = apps.patch_namespaced_deployment(
        "web", NS, {"spec": {"template": {"spec": {"containers": [
            {"name": "app", "resources": {"requests": {"cpu": "750m"}}}]}}}})
    after = sandbox.store.get("apps", "deployments", NS, "web")
    c_before = before["spec"]["template"]["spec"]["containers"]
    c_after = after["spec"]["template"]["spec"]["containers"]
    assert [c["name"] for c in c_after] == ["app", "sidecar"]
    assert c_after[1] == c_before[1]                                   # other container
    assert c_after[0]["env"] == c_before[0]["env"]                     # env untouched
    assert c_after[0]["readinessProbe"] == c_before[0]["readinessProbe"]
    assert c_after[0]["ports"] == c_before[0]["ports"]
    assert c_after[0]["resources"]["limits"] == {"cpu": "1", "memory": "512Mi"}
    assert c_after[0]["resources"]["requests"] == {"cpu": "750m", "memory": "256Mi"}
    assert patched.metadata.generation == before["metadata"]["generation"] + 1
    # A template change rolls the Deployment: the pods now carry the new request.
    pods = [p for p in sandbox.store.list("", "pods", NS)
            if p["metadata"]["labels"].get("app") == "web"]
    assert len(pods) == 2
    assert {p["spec"]["containers"][0]["resources"]["requests"]["cpu"] for p in pods} == {"750m"}


def test_strategic_merge_env_merges_by_name_and_patch_delete(apps, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    apps.patch_namespaced_deployment("web", NS, {"spec": {"template": {"spec": {"containers": [
        {"name": "app", "env": [{"name": "LEVEL", "value": "3"}, {"name": "NEW", "value": "x"},
                                {"name": "MODE", "$patch": "delete"}]}]}}}})
    env = sandbox.store.get("apps", "deployments", NS, "web")["spec"]["template"]["spec"][
        "containers"][0]["env"]
    # strategic merge: env merges by `name`; `$patch: delete` removes one element
    # (Kubernetes community doc "Strategic Merge Patch", directives).
    assert env == [{"name": "LEVEL", "value": "3"}, {"name": "NEW", "value": "x"}]


# --- validation -----------------------------------------------------------------------

def test_request_above_limit_is_422_like_the_api_server(apps) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    with pytest.raises(ApiException) as err:
        apps.patch_namespaced_deployment("web", NS, {"spec": {"template": {"spec": {
            "containers": [{"name": "app", "resources": {"requests": {"cpu": "2"}}}]}}}})
    assert err.value.status == 422
    st = status_of(err.value)
    # Message as built by Kubernetes pkg/apis/core/validation/validation.go
    # (ValidateContainerResourceRequirements): field.Invalid(reqPath, quantity.String(),
    # fmt.Sprintf("must be less than or equal to %s limit of %s", …)), wrapped by
    # apimachinery errors.NewInvalid as `<Kind>.<group> "<name>" is invalid: …`.
    assert st["kind"] == "Status" and st["status"] == "Failure" and st["reason"] == "Invalid"
    assert st["code"] == 422
    assert st["message"] == ('Deployment.apps "web" is invalid: spec.template.spec.'
                             'containers[0].resources.requests: Invalid value: "2": must be '
                             'less than or equal to cpu limit of 1')
    assert st["details"]["causes"] == [{
        "reason": "FieldValueInvalid",
        "message": 'Invalid value: "2": must be less than or equal to cpu limit of 1',
        "field": "spec.template.spec.containers[0].resources.requests"}]
    assert st["details"]["group"] == "apps" and st["details"]["kind"] == "Deployment"


def test_quantities_are_stored_canonically(apps) -> None:
    created = apps.create_namespaced_deployment(NS, deployment())
    res = created.spec.template.spec.containers[0].resources
    # Kubernetes API reference "Quantity": re-emitted in canonical form, "0.5" -> "500m".
    assert res.requests["cpu"] == "500m"
    assert parse_quantity(res.requests["cpu"]) == parse_quantity("0.5")  # reference library
    assert res.limits["memory"] == "512Mi"


def test_malformed_quantity_is_a_400(apps) -> None:
    bad = deployment()
    bad["spec"]["template"]["spec"]["containers"][0]["resources"]["requests"]["cpu"] = "half"
    with pytest.raises(ApiException) as err:
        apps.create_namespaced_deployment(NS, bad)
    # apimachinery resource.ParseQuantity's error, raised while decoding the body (400).
    assert err.value.status == 400
    assert "quantities must match the regular expression" in status_of(err.value)["message"]


def test_bad_name_is_rejected(apps) -> None:
    with pytest.raises(ApiException) as err:
        apps.create_namespaced_deployment(NS, deployment("Web_1"))
    st = status_of(err.value)
    # apimachinery validation.IsDNS1123Subdomain
    assert err.value.status == 422 and st["details"]["causes"][0]["field"] == "metadata.name"
    assert "RFC 1123 subdomain" in st["message"]


# --- optimistic concurrency -----------------------------------------------------------

def test_stale_resource_version_is_409(apps) -> None:
    created = apps.create_namespaced_deployment(NS, deployment())
    stale = created.metadata.resource_version
    apps.patch_namespaced_deployment("web", NS, {"metadata": {"labels": {"x": "1"}}})
    body = apps.read_namespaced_deployment("web", NS)
    body.metadata.resource_version = stale
    body.spec.replicas = 5
    with pytest.raises(ApiException) as err:
        apps.replace_namespaced_deployment("web", NS, body)
    # Kubernetes docs "API Concepts" (resource versions / optimistic concurrency):
    # an update with a stale metadata.resourceVersion fails with 409 Conflict.
    assert err.value.status == 409
    st = status_of(err.value)
    assert st["reason"] == "Conflict"
    assert st["message"].startswith('Operation cannot be fulfilled on deployments.apps "web"')
    assert apps.read_namespaced_deployment("web", NS).spec.replicas == 2


def test_resource_versions_are_one_global_counter(apps, core) -> None:
    a = apps.create_namespaced_deployment(NS, deployment("a"))
    ns = core.create_namespace({"metadata": {"name": "team-b"}})
    assert int(ns.metadata.resource_version) > int(a.metadata.resource_version)
    again = apps.patch_namespaced_deployment("a", NS, {"metadata": {"labels": {"app": "a"}}})
    # a no-op patch stores nothing: the version does not move (API Concepts)
    assert again.metadata.resource_version == \
        apps.read_namespaced_deployment("a", NS).metadata.resource_version


# --- dry run ---------------------------------------------------------------------------

def test_dry_run_all_changes_nothing(apps, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    before = sandbox.store.get("apps", "deployments", NS, "web")
    rv_before = sandbox.store.resource_version
    answer = apps.patch_namespaced_deployment(
        "web", NS, {"spec": {"template": {"spec": {"containers": [
            {"name": "app", "resources": {"requests": {"cpu": "800m"}}}]}}}}, dry_run="All")
    # Kubernetes docs "API Concepts" (dry-run): the would-be object comes back, nothing is
    # persisted, no resourceVersion moves.
    assert answer.spec.template.spec.containers[0].resources.requests["cpu"] == "800m"
    assert sandbox.store.get("apps", "deployments", NS, "web") == before
    assert sandbox.store.resource_version == rv_before
    with pytest.raises(ApiException) as err:   # validation still runs
        apps.patch_namespaced_deployment("web", NS, {"spec": {"template": {"spec": {
            "containers": [{"name": "app", "resources": {"requests": {"cpu": "3"}}}]}}}},
            dry_run="All")
    assert err.value.status == 422
    created = apps.create_namespaced_deployment(NS, deployment("other"), dry_run="All")
    assert created.metadata.name == "other"
    assert sandbox.store.get("apps", "deployments", NS, "other") is None


# --- JSON merge patch and JSON patch ---------------------------------------------------

def test_json_merge_patch_replaces_the_container_list(apps, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    apps.patch_namespaced_deployment(
        "web", NS, {"spec": {"template": {"spec": {"containers": [
            {"name": "app", "image": "registry.example/web:1.5"}]}}}},
        _content_type="application/merge-patch+json")
    containers = sandbox.store.get("apps", "deployments", NS, "web")["spec"]["template"][
        "spec"]["containers"]
    # RFC 7386 section 2: a non-object patch value (a list) replaces the target value.
    assert [c["name"] for c in containers] == ["app"]
    assert "env" not in containers[0] and containers[0]["resources"] == {}


def test_json_patch_ops_and_failed_test(apps, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment())
    path = "/spec/template/spec/containers/0/resources/requests/cpu"
    apps.patch_namespaced_deployment("web", NS, [
        {"op": "test", "path": path, "value": "500m"},
        {"op": "replace", "path": path, "value": "600m"},
        {"op": "add", "path": "/metadata/labels/example.test~1owner", "value": "team-a"},
        {"op": "remove", "path": "/spec/template/spec/containers/0/env/1"},
    ])
    obj = sandbox.store.get("apps", "deployments", NS, "web")
    c = obj["spec"]["template"]["spec"]["containers"][0]
    # RFC 6902 sections 4.1-4.6; "~1" is "/" in a JSON pointer (RFC 6901 section 4)
    assert c["resources"]["requests"]["cpu"] == "600m"
    assert obj["metadata"]["labels"]["example.test/owner"] == "team-a"
    assert c["env"] == [{"name": "MODE", "value": "fast"}]
    rv = obj["metadata"]["resourceVersion"]
    with pytest.raises(ApiException) as err:
        apps.patch_namespaced_deployment("web", NS, [
            {"op": "test", "path": path, "value": "999m"},
            {"op": "replace", "path": path, "value": "700m"}])
    # RFC 6902 section 5: a failed `test` aborts the whole patch; the API server answers 422
    assert err.value.status == 422
    assert sandbox.store.get("apps", "deployments", NS, "web")["metadata"][
        "resourceVersion"] == rv


# --- watch -----------------------------------------------------------------------------

def test_watch_delivers_added_and_modified(apps, sandbox) -> None:
    listed = apps.list_namespaced_deployment(NS)
    start = listed.metadata.resource_version
    apps.create_namespaced_deployment(NS, deployment())
    apps.patch_namespaced_deployment("web", NS, {"spec": {"replicas": 3}})
    w = watch.Watch()
    seen = []
    for ev in w.stream(apps.list_namespaced_deployment, NS, resource_version=start,
                       timeout_seconds=2):
        seen.append((ev["type"], ev["object"].metadata.name, ev["object"].spec.replicas))
        if ev["type"] == "MODIFIED" and ev["object"].spec.replicas == 3:
            w.stop()
    # Kubernetes docs "API Concepts" (efficient detection of changes): a watch from a
    # resourceVersion delivers every change after it, in order.
    assert seen[0] == ("ADDED", "web", 2)
    assert ("MODIFIED", "web", 3) in seen


def test_watch_label_selector_and_bookmarks(core, sandbox) -> None:
    start = core.list_namespaced_pod(NS).metadata.resource_version
    pod = {"metadata": {"name": "p1", "labels": {"app": "x"}},
           "spec": {"containers": [{"name": "c", "image": "img:1"}]}}
    core.create_namespaced_pod(NS, pod)
    core.create_namespaced_pod(NS, {**pod, "metadata": {"name": "p2", "labels": {"app": "y"}}})
    resp = core.list_namespaced_pod(NS, watch=True, resource_version=start,
                                    label_selector="app in (x,z)", allow_watch_bookmarks=True,
                                    timeout_seconds=1, _preload_content=False)
    events = [json.loads(line) for line in resp.read().decode().splitlines() if line]
    kinds = [(e["type"], e["object"]["metadata"].get("name")) for e in events]
    assert ("ADDED", "p1") in kinds and ("ADDED", "p2") not in kinds
    # API Concepts "Watch bookmarks": BOOKMARK events carry only metadata.resourceVersion
    marks = [e for e in events if e["type"] == "BOOKMARK"]
    assert marks and set(marks[0]["object"]["metadata"]) == {"resourceVersion"}


def test_watch_from_a_compacted_version_gets_410(apps, sandbox) -> None:
    start = apps.list_namespaced_deployment(NS).metadata.resource_version
    apps.create_namespaced_deployment(NS, deployment())
    sandbox.store.compact()
    resp = apps.list_namespaced_deployment(NS, watch=True, resource_version=start,
                                           timeout_seconds=1, _preload_content=False)
    events = [json.loads(line) for line in resp.read().decode().splitlines() if line]
    # Kubernetes docs "API Concepts": "410 Gone" when the requested resourceVersion is
    # too old; the watch answers an ERROR event holding a Status with reason Expired.
    assert events[0]["type"] == "ERROR"
    assert events[0]["object"]["code"] == 410 and events[0]["object"]["reason"] == "Expired"
    w = watch.Watch()
    with pytest.raises(ApiException) as err:    # the client gives up on a 410 with timeout
        for _ in w.stream(apps.list_namespaced_deployment, NS, resource_version=start,
                          timeout_seconds=1):
            pass
    assert err.value.status == 410


# --- CRDs ------------------------------------------------------------------------------

@pytest.fixture
def widgets(sandbox_api, test_crd, custom):
    ext = client.ApiextensionsV1Api(sandbox_api)
    ext.create_custom_resource_definition(test_crd)
    return custom


def widget(name: str = "w1", **spec: Any) -> dict[str, Any]:
    return {"apiVersion": "example.test/v1", "kind": "Widget", "metadata": {"name": name},
            "spec": {"size": 3, **spec}}


def test_crd_is_discoverable_and_defaults_apply(widgets, sandbox_api) -> None:
    res = client.ApisApi(sandbox_api).get_api_versions()
    assert "example.test" in [g.name for g in res.groups]
    rl = client.CustomObjectsApi(sandbox_api).get_api_resources("example.test", "v1")
    names = {r.name: r for r in rl.resources}
    assert names["widgets"].kind == "Widget" and names["widgets"].namespaced
    assert "widgets/status" in names and names["widgets"].short_names == ["wd"]
    obj = widgets.create_namespaced_custom_object("example.test", "v1", NS, "widgets", widget())
    # CRD docs "Defaulting": a `default` of the schema is applied on create
    assert obj["spec"]["mode"] == "dry-run"
    assert obj["metadata"]["generation"] == 1


@pytest.mark.parametrize(("spec", "field", "fragment"), [
    ({"size": 0}, "spec.size", "should be greater than or equal to 1"),
    ({"size": 11}, "spec.size", "should be less than or equal to 10"),
    ({"size": "3"}, "spec.size", "must be of type integer"),
    ({"size": 3, "mode": "fast"}, "spec.mode", 'supported values: "dry-run", "apply"'),
    ({"size": 3, "tag": "A1"}, "spec.tag", "should match '^[a-z]+$'"),
    ({"size": 3, "items": ["a", "b", "c"]}, "spec.items", "must have at most 2 items"),
    ({"mode": "apply"}, "spec.size", "Required value"),
])
def test_crd_schema_violations_are_rejected(widgets, spec, field, fragment) -> None:
    body = widget()
    body["spec"] = spec
    with pytest.raises(ApiException) as err:
        widgets.create_namespaced_custom_object("example.test", "v1", NS, "widgets", body)
    # CRD docs "Validation": objects failing the openAPIV3Schema are refused with 422
    assert err.value.status == 422
    st = status_of(err.value)
    assert st["reason"] == "Invalid"
    assert st["message"].startswith('Widget.example.test "w1" is invalid: ')
    assert any(c["field"] == field and fragment in c["message"]
               for c in st["details"]["causes"]), st


def test_unknown_fields_are_pruned(widgets) -> None:
    obj = widgets.create_namespaced_custom_object("example.test", "v1", NS, "widgets",
                                                  widget(colour="red"))
    # CRD docs "Field pruning": fields not in a structural schema are dropped
    assert "colour" not in obj["spec"]


def test_status_writes_do_not_bump_generation(widgets) -> None:
    g, v, p = "example.test", "v1", "widgets"
    widgets.create_namespaced_custom_object(g, v, NS, p, widget())
    st = widgets.patch_namespaced_custom_object_status(
        g, v, NS, p, "w1", {"status": {"phase": "Ready", "observedGeneration": 1},
                             "spec": {"size": 9}})
    # CRD docs "Status subresource": status writes ignore spec and do not move generation;
    # main-resource writes ignore status; generation moves on spec changes only.
    assert st["metadata"]["generation"] == 1
    assert st["status"]["phase"] == "Ready" and st["spec"]["size"] == 3
    main = widgets.patch_namespaced_custom_object(g, v, NS, p, "w1",
                                                  {"spec": {"size": 4},
                                                   "status": {"phase": "Hacked"}})
    assert main["metadata"]["generation"] == 2
    assert main["status"]["phase"] == "Ready"
    labels = widgets.patch_namespaced_custom_object(g, v, NS, p, "w1",
                                                    {"metadata": {"labels": {"a": "b"}}})
    assert labels["metadata"]["generation"] == 2


def test_custom_objects_refuse_strategic_merge(widgets) -> None:
    widgets.create_namespaced_custom_object("example.test", "v1", NS, "widgets", widget())
    with pytest.raises(ApiException) as err:
        widgets.patch_namespaced_custom_object(
            "example.test", "v1", NS, "widgets", "w1", {"spec": {"size": 4}},
            _content_type="application/strategic-merge-patch+json")
    # CRD docs: "strategic merge patch is not supported" for custom resources -> 415
    assert err.value.status == 415
    assert status_of(err.value)["reason"] == "UnsupportedMediaType"


def test_deployment_status_counters_and_statefulset_pods(apps, core, sandbox) -> None:
    apps.create_namespaced_deployment(NS, deployment(replicas=3))
    d = apps.read_namespaced_deployment("web", NS)
    assert (d.status.replicas, d.status.ready_replicas, d.status.updated_replicas,
            d.status.available_replicas, d.status.observed_generation) == (3, 3, 3, 3, 1)
    pods = core.list_namespaced_pod(NS, label_selector="app=web").items
    assert len(pods) == 3
    for p in pods:
        # pod names <deployment>-<pod-template-hash>-<5 chars>, label pod-template-hash
        h = p.metadata.labels["pod-template-hash"]
        assert p.metadata.name.startswith(f"web-{h}-") and len(p.metadata.name) == len(
            f"web-{h}-") + 5
        assert p.status.phase == "Running"
        assert p.status.qos_class == "Burstable"
    sts = copy.deepcopy(deployment("db", replicas=2))
    sts["kind"] = "StatefulSet"
    sts["spec"]["serviceName"] = "db"
    apps.create_namespaced_stateful_set(NS, sts)
    names = sorted(p.metadata.name for p in
                   core.list_namespaced_pod(NS, label_selector="app=db").items)
    assert names == ["db-0", "db-1"]
    assert apps.read_namespaced_stateful_set("db", NS).status.ready_replicas == 2


def test_list_pages_with_limit_and_continue(core) -> None:
    for i in range(5):
        core.create_namespace({"metadata": {"name": f"team-{i}"}})
    first = core.list_namespace(limit=3)
    # API Concepts "Retrieving large results sets in chunks": limit + continue token,
    # remainingItemCount; the last page has no continue token
    assert len(first.items) == 3 and first.metadata._continue
    assert first.metadata.remaining_item_count == 9 - 3   # 4 built-in + 5 created
    rest = core.list_namespace(limit=10, _continue=first.metadata._continue)
    assert not rest.metadata._continue
    names = [n.metadata.name for n in first.items + rest.items]
    assert len(names) == 9 and len(set(names)) == 9


def test_label_and_annotation_keys_are_validated(apps) -> None:
    bad = deployment()
    bad["metadata"]["labels"]["team"] = "a b"
    bad["metadata"]["annotations"] = {"ratefit.dev/previous-requests": "{}", "bad key!": "x"}
    with pytest.raises(ApiException) as err:
        apps.create_namespaced_deployment(NS, bad)
    # apimachinery ValidateObjectMeta: label values and qualified-name keys
    fields = [c["field"] for c in status_of(err.value)["details"]["causes"]]
    assert fields == ["metadata.labels", "metadata.annotations"]


def test_custom_object_put_needs_a_resource_version(widgets) -> None:
    g, v, p = "example.test", "v1", "widgets"
    obj = widgets.create_namespaced_custom_object(g, v, NS, p, widget())
    del obj["metadata"]["resourceVersion"]
    with pytest.raises(ApiException) as err:
        widgets.replace_namespaced_custom_object(g, v, NS, p, "w1", obj)
    # custom resources allow no unconditional update (CRD docs; apiextensions strategy)
    assert err.value.status == 422
    assert "metadata.resourceVersion" in status_of(err.value)["message"]


def test_every_kind_reads_back_into_the_typed_client_models(sandbox_api, apps, core,
                                                             test_crd) -> None:
    """The v37 client validates its models (pydantic): every object the sandbox makes up
    (statuses, conditions, owner references, node info) must carry the required fields."""
    apps.create_namespaced_deployment(NS, deployment())
    sts = deployment("db")
    sts["kind"] = "StatefulSet"
    apps.create_namespaced_stateful_set(NS, sts)
    client.ApiextensionsV1Api(sandbox_api).create_custom_resource_definition(test_crd)
    client.EventsV1Api(sandbox_api).create_namespaced_event(NS, {
        "metadata": {"name": "e1"}, "eventTime": "2026-01-01T00:00:00.000000Z",
        "reportingController": "ratefit.dev/controller", "reportingInstance": "t",
        "action": "Patch", "reason": "Tested", "type": "Normal",
        "regarding": {"kind": "Deployment", "namespace": NS, "name": "web"}})
    client.CoordinationV1Api(sandbox_api).create_namespaced_lease(NS, {
        "metadata": {"name": "l"}, "spec": {"holderIdentity": "x"}})
    assert len(apps.list_namespaced_replica_set(NS).items) == 1
    assert all(p.status.container_statuses for p in core.list_namespaced_pod(NS).items)
    assert core.list_namespaced_event(NS).items[0].involved_object.name == "web"
    assert core.read_namespace(NS).status.phase == "Active"
    assert core.list_node().items[0].status.node_info.kubelet_version
    assert apps.read_namespaced_deployment_scale("web", NS).spec.replicas == 2
    assert apps.read_namespaced_stateful_set("db", NS).status.current_revision
    crd = client.ApiextensionsV1Api(sandbox_api).read_custom_resource_definition(
        "widgets.example.test")
    assert [c.type for c in crd.status.conditions] == ["NamesAccepted", "Established"]
    assert client.CoordinationV1Api(sandbox_api).read_namespaced_lease(
        "l", NS).spec.holder_identity == "x"


def test_concurrent_read_modify_write_has_one_winner(sandbox, sandbox_api) -> None:
    import threading

    coord = client.CoordinationV1Api(sandbox_api)
    coord.create_namespaced_lease(NS, {"metadata": {"name": "race"},
                                       "spec": {"holderIdentity": "nobody"}})
    seen = coord.read_namespaced_lease("race", NS)
    start = threading.Barrier(6)
    results: list[str] = []

    def contender(i: int) -> None:
        api = sandbox.api_client()
        try:
            body = copy.deepcopy(seen)
            body.spec.holder_identity = f"c{i}"
            start.wait()
            try:
                client.CoordinationV1Api(api).replace_namespaced_lease("race", NS, body)
                results.append(f"c{i}")
            except ApiException as exc:
                results.append(str(exc.status))
        finally:
            api.close()

    threads = [threading.Thread(target=contender, args=(i,)) for i in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(10)
    # optimistic concurrency (API Concepts): all carry the same resourceVersion, so exactly
    # one update wins and the others get 409 Conflict
    winners = [r for r in results if r.startswith("c")]
    assert len(winners) == 1 and sorted(set(results) - set(winners)) == ["409"]
    assert coord.read_namespaced_lease("race", NS).spec.holder_identity == winners[0]


def test_cluster_scoped_crd_with_two_served_versions(sandbox_api, custom) -> None:
    crd = {
        "apiVersion": "apiextensions.k8s.io/v1", "kind": "CustomResourceDefinition",
        "metadata": {"name": "zones.example.test"},
        "spec": {"group": "example.test", "scope": "Cluster",
                 "names": {"plural": "zones", "kind": "Zone"},
                 "versions": [
                     {"name": "v1beta1", "served": True, "storage": False,
                      "schema": {"openAPIV3Schema": {"type": "object", "properties": {
                          "spec": {"type": "object", "properties": {
                              "cores": {"type": "integer"}}}}}}},
                     {"name": "v1", "served": True, "storage": True,
                      "schema": {"openAPIV3Schema": {"type": "object", "properties": {
                          "spec": {"type": "object", "properties": {
                              "cores": {"type": "integer", "minimum": 1}}}}}}}]}}
    ext = client.ApiextensionsV1Api(sandbox_api)
    ext.create_custom_resource_definition(crd)
    custom.create_cluster_custom_object("example.test", "v1", "zones", {
        "apiVersion": "example.test/v1", "kind": "Zone", "metadata": {"name": "north"},
        "spec": {"cores": 8}})
    old = custom.get_cluster_custom_object("example.test", "v1beta1", "zones", "north")
    # CRD versioning docs: every served version shows the same objects (no conversion
    # webhook: only apiVersion differs)
    assert old["apiVersion"] == "example.test/v1beta1" and old["spec"]["cores"] == 8
    with pytest.raises(ApiException) as err:
        custom.create_cluster_custom_object("example.test", "v1", "zones", {
            "apiVersion": "example.test/v1", "kind": "Zone", "metadata": {"name": "south"},
            "spec": {"cores": 0}})
    assert err.value.status == 422
    ext.delete_custom_resource_definition("zones.example.test")
    with pytest.raises(ApiException) as err:   # the resource is gone from the API
        custom.list_cluster_custom_object("example.test", "v1", "zones")
    assert err.value.status == 404


def test_watch_from_a_future_version_times_out_with_504(apps, sandbox) -> None:
    future = sandbox.store.resource_version + 1000
    resp = apps.list_namespaced_deployment(NS, watch=True, resource_version=str(future),
                                           timeout_seconds=10, _preload_content=False)
    events = [json.loads(line) for line in resp.read().decode().splitlines() if line]
    # apiserver watch cache: "Too large resource version" (504, reason Timeout,
    # cause ResourceVersionTooLarge) after waiting ~3 s (from memory)
    assert events[0]["type"] == "ERROR" and events[0]["object"]["code"] == 504
    assert events[0]["object"]["details"]["causes"][0]["reason"] == "ResourceVersionTooLarge"
