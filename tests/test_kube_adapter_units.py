"""The adapter's pure parts: error translation, backoff, and reading Kubernetes JSON
into Workload/Pod/HPA values. The end-to-end behaviour against the sandbox over HTTP is
in test_kube_adapter_e2e.py."""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from kubernetes.client.exceptions import ApiException
from urllib3.exceptions import NewConnectionError, ProtocolError

from ratefit.controller.errors import (
    KubeConflict,
    KubeError,
    KubeForbidden,
    KubeGone,
    KubeInvalid,
    KubeNotFound,
    KubeUnavailable,
)
from ratefit.controller.kube import _hpa, _pod, _selector, _workload, cpu_patch_body
from ratefit.controller.kube_retry import RetryPolicy, call_with_retry, retry_on_conflict, translate
from ratefit.controller.workload import (
    PREVIOUS_REQUESTS_ANNOTATION,
    CpuChange,
    PreviousRequest,
    WorkloadKind,
    decode_previous_requests,
    encode_previous_requests,
)
from ratefit.models.errors import InputError, RatefitError


def _status(code: int, reason: str, message: str) -> str:
    # metav1.Status, the body of every API server error (API reference, "Status")
    return json.dumps({"kind": "Status", "apiVersion": "v1", "status": "Failure",
                       "message": message, "reason": reason, "code": code})


@pytest.mark.parametrize(
    ("code", "reason", "cls"),
    [
        (409, "Conflict", KubeConflict),
        (404, "NotFound", KubeNotFound),
        (403, "Forbidden", KubeForbidden),
        (401, "Unauthorized", KubeForbidden),
        (410, "Expired", KubeGone),
        (422, "Invalid", KubeInvalid),
        (400, "BadRequest", KubeInvalid),
        (429, "TooManyRequests", KubeUnavailable),
        (500, "InternalError", KubeUnavailable),
        (503, "ServiceUnavailable", KubeUnavailable),
        (501, "NotImplemented", KubeError),
    ],
)
def test_translate_by_status(code: int, reason: str, cls: type[KubeError]) -> None:
    exc = ApiException(status=code, reason=reason)
    exc.body = _status(code, reason, "the server said so")
    err = translate(exc, what="patch of ns/Deployment/web")
    assert type(err) is cls
    assert isinstance(err, RatefitError)
    assert err.status == code and err.reason == reason
    assert "the server said so" in str(err) and "patch of ns/Deployment/web" in str(err)
    assert err.temporary == (code in (429, 500, 503))


def test_invalid_keeps_server_message() -> None:
    # the API server's wording for request > limit (DESIGN.md, Kubernetes facts)
    msg = ('Deployment.apps "web" is invalid: spec.template.spec.containers[0].resources.requests: '
           'Invalid value: "2": must be less than or equal to cpu limit of 1')
    exc = ApiException(status=422, reason="Unprocessable Entity")
    exc.body = _status(422, "Invalid", msg)
    err = translate(exc, what="dry-run")
    assert isinstance(err, KubeInvalid) and err.server_message == msg


def test_retry_after_header_is_read() -> None:
    exc = ApiException(status=429, reason="Too Many Requests")
    exc.headers = {"Retry-After": "3"}
    assert translate(exc, what="x").retry_after == 3.0


def test_connection_errors_are_temporary() -> None:
    err = translate(NewConnectionError(None, "refused"), what="list pods")
    assert isinstance(err, KubeUnavailable) and err.temporary


def test_full_jitter_bounds() -> None:
    # full jitter: U(0, min(cap, base * 2^n))  (AWS Architecture Blog, "Exponential Backoff And Jitter")
    p = RetryPolicy(base_delay=0.5, max_delay=4.0)
    assert p.delay(0, retry_after=None, rng=lambda: 1.0) == 0.5
    assert p.delay(2, retry_after=None, rng=lambda: 1.0) == 2.0
    assert p.delay(10, retry_after=None, rng=lambda: 1.0) == 4.0
    assert p.delay(10, retry_after=None, rng=lambda: 0.0) == 0.0
    # Retry-After (RFC 9110 §10.2.3) wins, capped by max_retry_after
    assert p.delay(0, retry_after=7, rng=lambda: 0.0) == 7
    assert RetryPolicy(max_retry_after=2).delay(0, retry_after=60, rng=lambda: 0.0) == 2


def test_call_with_retry_waits_then_succeeds() -> None:
    slept: list[float] = []
    answers = [ApiException(status=503), ProtocolError("reset"), "ok"]

    def fn() -> str:
        a = answers.pop(0)
        if isinstance(a, BaseException):
            raise a
        return a

    out = call_with_retry(fn, what="x", policy=RetryPolicy(base_delay=1, max_delay=8), sleep=slept.append,
                          rng=lambda: 1.0)
    assert out == "ok" and slept == [1, 2]


def test_call_with_retry_gives_up_and_chains() -> None:
    calls = []

    def fn() -> None:
        calls.append(1)
        raise ApiException(status=500)

    with pytest.raises(KubeUnavailable) as info:
        call_with_retry(fn, what="x", policy=RetryPolicy(max_attempts=3), sleep=lambda s: None)
    assert len(calls) == 3 and isinstance(info.value.__cause__, ApiException)


def test_permanent_errors_are_not_retried() -> None:
    calls = []

    def fn() -> None:
        calls.append(1)
        raise ApiException(status=409)

    with pytest.raises(KubeConflict):
        call_with_retry(fn, what="x", policy=RetryPolicy(), sleep=lambda s: None)
    assert calls == [1]


def test_retry_on_conflict_rereads() -> None:
    seen = []

    def fn() -> int:
        seen.append(1)
        if len(seen) < 3:
            raise KubeConflict("stale", status=409)
        return len(seen)

    assert retry_on_conflict(fn, attempts=3) == 3
    seen.clear()
    with pytest.raises(KubeConflict):
        retry_on_conflict(fn, attempts=2)


# A Deployment as the API returns it (shape from the apps/v1 API reference).
DEPLOYMENT = {
    "apiVersion": "apps/v1", "kind": "Deployment",
    "metadata": {"name": "web", "namespace": "shop", "uid": "u-1", "generation": 4, "resourceVersion": "812",
                 "annotations": {"ratefit.dev/previous-requests": '{"app":{"cpu_limit":null,"cpu_request":"250m"}}'}},
    "spec": {
        "replicas": 3,
        "selector": {"matchLabels": {"app": "web", "tier": "front"},
                     "matchExpressions": [{"key": "track", "operator": "NotIn", "values": ["canary"]},
                                          {"key": "env", "operator": "Exists"}]},
        "template": {"spec": {"containers": [
            {"name": "app", "resources": {"requests": {"cpu": "0.5", "memory": "256Mi"}, "limits": {"cpu": "1"}}},
            {"name": "sidecar"},
        ]}},
    },
    "status": {"observedGeneration": 4, "replicas": 3, "updatedReplicas": 3},
}


def test_workload_from_json() -> None:
    wl = _workload(DEPLOYMENT, WorkloadKind.DEPLOYMENT)
    assert (wl.namespace, wl.name, wl.generation, wl.resource_version, wl.replicas) == ("shop", "web", 4, "812", 3)
    assert wl.selector == "app=web,tier=front,track notin (canary),env"
    app = wl.container("app")
    assert (app.cpu_request_m, app.cpu_limit_m, app.mem_request, app.mem_limit) == (500, 1000, "256Mi", None)
    assert wl.container("sidecar").cpu_request_m is None
    assert not wl.rollout_in_progress
    assert wl.previous_requests == {"app": PreviousRequest(250, None)}
    with pytest.raises(InputError, match="no container 'db'"):
        wl.container("db")


@pytest.mark.parametrize(
    "status",
    [{"observedGeneration": 3, "replicas": 3, "updatedReplicas": 3},   # controller has not seen gen 4
     {"observedGeneration": 4, "replicas": 4, "updatedReplicas": 2},   # old pods still running
     {"observedGeneration": 4, "replicas": 3, "updatedReplicas": 1}],
)
def test_rollout_in_progress(status: dict) -> None:
    assert _workload({**DEPLOYMENT, "status": status}, WorkloadKind.DEPLOYMENT).rollout_in_progress


def test_selector_syntax() -> None:
    # label-selector query syntax (Kubernetes docs, "Labels and Selectors")
    sel = {"matchExpressions": [{"key": "a", "operator": "In", "values": ["x", "y"]},
                                {"key": "b", "operator": "DoesNotExist"}]}
    assert _selector(sel) == "a in (x,y),!b"
    assert _selector(None) == ""


def test_pod_prefers_actual_resources() -> None:
    pod = {
        "metadata": {"name": "web-1", "namespace": "shop", "uid": "p", "resourceVersion": "9"},
        "spec": {"containers": [{"name": "app", "resources": {"requests": {"cpu": "300m"}, "limits": {"cpu": "1"}}}]},
        "status": {"phase": "Running",
                   "containerStatuses": [{"name": "app", "resources": {"requests": {"cpu": "250m"}, "limits": {"cpu": "1"}}}],
                   "conditions": [{"type": "PodResizeInProgress", "status": "True"}]},
    }
    p = _pod(pod)
    assert p.containers[0].cpu_request_m == 250 and p.containers[0].spec_cpu_request_m == 300
    assert p.phase == "Running" and "PodResizeInProgress" in p.resize_conditions


def _hpa_obj(metrics: list | None) -> dict:
    spec = {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment", "name": "web"}, "maxReplicas": 5}
    if metrics is not None:
        spec["metrics"] = metrics
    return {"metadata": {"name": "web", "namespace": "shop"}, "spec": spec}


def test_hpa_cpu_utilization_detection() -> None:
    cpu_util = {"type": "Resource", "resource": {"name": "cpu", "target": {"type": "Utilization", "averageUtilization": 60}}}
    cpu_value = {"type": "Resource", "resource": {"name": "cpu", "target": {"type": "AverageValue", "averageValue": "500m"}}}
    mem_util = {"type": "Resource", "resource": {"name": "memory", "target": {"type": "Utilization", "averageUtilization": 60}}}
    ctr_util = {"type": "ContainerResource",
                "containerResource": {"name": "cpu", "container": "app", "target": {"type": "Utilization"}}}
    assert _hpa(_hpa_obj([cpu_util])).scales_on_cpu_utilization
    assert _hpa(_hpa_obj([ctr_util])).scales_on_cpu_utilization
    assert not _hpa(_hpa_obj([cpu_value, mem_util])).scales_on_cpu_utilization
    # autoscaling/v2 reference: no metrics → default 80% average CPU utilization
    h = _hpa(_hpa_obj(None))
    assert h.scales_on_cpu_utilization and (h.target_kind, h.target_name) == ("Deployment", "web")


def test_previous_requests_round_trip_and_errors() -> None:
    values = {"b": PreviousRequest(1500, None), "a": PreviousRequest(None, 2000)}
    text = encode_previous_requests(values)
    assert json.loads(text) == {"a": {"cpu_request": None, "cpu_limit": "2"},
                                "b": {"cpu_request": "1500m", "cpu_limit": None}}
    assert decode_previous_requests(text) == values
    for bad in ("{not json", "[1]", '{"a": 3}', '{"a": {"cpu_request": "lots"}}'):
        with pytest.raises(InputError, match="previous-requests"):
            decode_previous_requests(bad)


def test_cpu_change_validation() -> None:
    with pytest.raises(InputError):
        CpuChange(100, limit_m=200, drop_limit=True)
    with pytest.raises(InputError):
        CpuChange(-1)


# ---------------------------------------------------------------- the patch body
_changes = st.builds(
    lambda req, lim, drop: CpuChange(req, limit_m=None if drop else lim, drop_limit=drop),
    st.integers(0, 64_000), st.none() | st.integers(0, 64_000), st.booleans(),
)


def _leaves(doc, prefix=""):
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _leaves(v, f"{prefix}.{k}" if prefix else k)
    elif isinstance(doc, list):
        for item in doc:
            yield from _leaves(item, prefix + "[]")
    else:
        yield prefix


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(st.sampled_from(["app", "sidecar"]), _changes, min_size=1))
def test_template_patch_touches_only_cpu_and_our_annotation(changes) -> None:
    # DESIGN.md step 10: an explicit strategic-merge patch of the container (merge key
    # `name`) touching nothing but CPU; the resourceVersion makes it conditional.
    wl = _workload(DEPLOYMENT, WorkloadKind.DEPLOYMENT)
    body = cpu_patch_body(wl, changes, record_previous=True)
    allowed = {
        "metadata.resourceVersion",
        f"metadata.annotations.{PREVIOUS_REQUESTS_ANNOTATION}",
        "spec.template.spec.containers[].name",
        "spec.template.spec.containers[].resources.requests.cpu",
        "spec.template.spec.containers[].resources.limits.cpu",
    }
    assert set(_leaves(body)) <= allowed
    assert body["metadata"]["resourceVersion"] == wl.resource_version
    sent = {c["name"]: c["resources"] for c in body["spec"]["template"]["spec"]["containers"]}
    assert set(sent) == set(changes)
    for name, change in changes.items():
        limits = sent[name].get("limits")
        if change.drop_limit:
            assert limits == {"cpu": None}  # strategic merge: null deletes the key
        elif change.limit_m is None:
            assert limits is None  # limits: keep → not mentioned at all
    # the annotation keeps what was recorded before (app: 250m from DEPLOYMENT) and adds
    # the current values of containers changed for the first time
    prev = decode_previous_requests(body["metadata"]["annotations"][PREVIOUS_REQUESTS_ANNOTATION])
    assert prev["app"] == PreviousRequest(250, None)
    if "sidecar" in changes:
        assert prev["sidecar"] == PreviousRequest(None, None)


def test_every_workload_kind_has_its_own_apps_v1_calls() -> None:
    """One row per kind, each naming that kind's own endpoints (Kubernetes API reference,
    apps/v1: Deployment and StatefulSet each have read/list/patch); a kind without a
    row is refused with a message, never sent to another kind's endpoint."""
    from kubernetes import client as k8s

    from ratefit.controller.kube import KubeAdapter

    adapter = KubeAdapter(k8s.ApiClient(k8s.Configuration()))
    words = {WorkloadKind.DEPLOYMENT: "deployment", WorkloadKind.STATEFULSET: "stateful_set"}
    assert set(adapter._workload_api) == set(WorkloadKind)
    for kind, word in words.items():
        api = adapter._api_of(kind)
        for fn in (api.read, api.list_namespaced, api.list_all, api.patch):
            assert word in fn.__name__, (kind, fn.__name__)
    del adapter._workload_api[WorkloadKind.STATEFULSET]
    with pytest.raises(InputError, match="not supported; use one of Deployment"):
        adapter._api_of(WorkloadKind.STATEFULSET)
    with pytest.raises(InputError, match="not supported"):
        adapter.read_workload("shop", "CronJob", "nightly")
