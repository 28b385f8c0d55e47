"""Fault injection of the sandbox (per route: latency, 5xx, 429 + Retry-After, forced
409, dropped watch streams), in-process and over HTTP against `ratefit sandbox` in a
subprocess; and the coordination/events/autoscaling objects the controller uses.

The faults imitate what a real API server sends: errors as `Status` objects with the
apimachinery reasons (InternalError, ServiceUnavailable, TooManyRequests with
`details.retryAfterSeconds` and a `Retry-After` header, Conflict).
"""

from __future__ import annotations

import json
import time
import urllib.request

import pytest
from kubernetes import client, config, watch
from kubernetes.client.rest import ApiException

NS = "default"


@pytest.fixture
def core(sandbox_api) -> client.CoreV1Api:
    return client.CoreV1Api(sandbox_api)


def test_injected_errors_then_recovery(sandbox, core) -> None:
    sandbox.faults.add("GET", r"/namespaces/default/pods$", status=503, count=2)
    for _ in range(2):
        with pytest.raises(ApiException) as err:
            core.list_namespaced_pod(NS)
        assert err.value.status == 503
        assert json.loads(err.value.body)["reason"] == "ServiceUnavailable"
    assert core.list_namespaced_pod(NS).items == []      # count used up
    sandbox.faults.add("*", r"/pods", status=500, count=1)
    with pytest.raises(ApiException) as err:
        core.list_namespaced_pod(NS)
    st = json.loads(err.value.body)
    assert err.value.status == 500 and st["reason"] == "InternalError"
    assert st["message"].startswith("Internal error occurred: ")


def test_429_has_retry_after(sandbox, core) -> None:
    sandbox.faults.add("POST", r"/pods$", status=429, retry_after=2)
    with pytest.raises(ApiException) as err:
        core.create_namespaced_pod(NS, {"metadata": {"name": "p"}, "spec": {
            "containers": [{"name": "c", "image": "i:1"}]}})
    # apimachinery errors.NewTooManyRequests: reason TooManyRequests, retryAfterSeconds,
    # and the Retry-After header (RFC 9110 section 10.2.3)
    assert err.value.status == 429
    assert err.value.headers["Retry-After"] == "2"
    assert json.loads(err.value.body)["details"]["retryAfterSeconds"] == 2
    assert core.list_namespaced_pod(NS).items == []       # nothing was created


def test_forced_conflict_and_latency(sandbox, core) -> None:
    core.create_namespace({"metadata": {"name": "lab"}})
    sandbox.faults.add("PATCH", r"/namespaces/lab$", conflict=True)
    with pytest.raises(ApiException) as err:
        core.patch_namespace("lab", {"metadata": {"labels": {"a": "b"}}})
    assert err.value.status == 409 and json.loads(err.value.body)["reason"] == "Conflict"
    sandbox.faults.add("GET", r"/namespaces/lab$", latency=0.3)
    t0 = time.monotonic()
    core.read_namespace("lab")
    assert time.monotonic() - t0 >= 0.3
    sandbox.faults.clear()
    assert core.patch_namespace("lab", {"metadata": {"labels": {"a": "b"}}}).metadata.labels[
        "a"] == "b"


def test_dropped_watch_stream(sandbox, core) -> None:
    core.create_namespace({"metadata": {"name": "lab"}})
    sandbox.faults.add("GET", r"/api/v1/namespaces$", drop_watch=True)
    resp = core.list_namespace(watch=True, timeout_seconds=5, _preload_content=False)
    t0 = time.monotonic()
    with pytest.raises(Exception):   # urllib3 ProtocolError: the stream was cut mid-way
        resp.read()
    assert time.monotonic() - t0 < 4
    # without the fault the same watch runs to its timeout and ends cleanly
    events = list(watch.Watch().stream(core.list_namespace, timeout_seconds=1))
    assert "lab" in [e["object"].metadata.name for e in events]


def test_lease_optimistic_concurrency(sandbox_api) -> None:
    coord = client.CoordinationV1Api(sandbox_api)
    lease = coord.create_namespaced_lease(NS, {
        "metadata": {"name": "ratefit-controller"},
        "spec": {"holderIdentity": "a", "leaseDurationSeconds": 15, "leaseTransitions": 0,
                 "acquireTime": "2026-01-01T00:00:00.000000Z",
                 "renewTime": "2026-01-01T00:00:00.000000Z"}})
    mine = coord.read_namespaced_lease("ratefit-controller", NS)
    theirs = coord.read_namespaced_lease("ratefit-controller", NS)
    mine.spec.holder_identity = "b"
    coord.replace_namespaced_lease("ratefit-controller", NS, mine)
    theirs.spec.holder_identity = "c"
    with pytest.raises(ApiException) as err:     # API Concepts: stale resourceVersion -> 409
        coord.replace_namespaced_lease("ratefit-controller", NS, theirs)
    assert err.value.status == 409
    now = coord.read_namespaced_lease("ratefit-controller", NS)
    assert now.spec.holder_identity == "b"
    assert int(now.metadata.resource_version) > int(lease.metadata.resource_version)
    assert now.spec.renew_time.year == 2026                 # MicroTime round-trips


def test_events_v1_validation_and_storage(sandbox_api) -> None:
    ev = client.EventsV1Api(sandbox_api)
    body = {"metadata": {"name": "web.1"}, "eventTime": "2026-01-01T00:00:00.000000Z",
            "reportingController": "ratefit.dev/controller", "reportingInstance": "pod-a",
            "action": "Resize", "reason": "CPURequestChanged", "type": "Normal",
            "note": "cpu 500m -> 400m",
            "regarding": {"kind": "Deployment", "namespace": NS, "name": "web"}}
    ev.create_namespaced_event(NS, body)
    got = ev.list_namespaced_event(NS).items
    assert [(e.reason, e.reporting_controller) for e in got] == [
        ("CPURequestChanged", "ratefit.dev/controller")]
    bad = dict(body, metadata={"name": "web.2"}, type="Info")
    bad.pop("action")
    with pytest.raises(ApiException) as err:
        ev.create_namespaced_event(NS, bad)
    # events.k8s.io/v1 validation: action required, type Normal|Warning
    causes = {c["field"] for c in json.loads(err.value.body)["details"]["causes"]}
    assert causes == {"action", "type"}


def test_hpa_is_stored_and_read(sandbox_api) -> None:
    hpa = client.AutoscalingV2Api(sandbox_api)
    hpa.create_namespaced_horizontal_pod_autoscaler(NS, {
        "metadata": {"name": "web"},
        "spec": {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment",
                                    "name": "web"},
                 "minReplicas": 2, "maxReplicas": 10,
                 "metrics": [{"type": "Resource", "resource": {
                     "name": "cpu", "target": {"type": "Utilization",
                                               "averageUtilization": 70}}}]}})
    got = hpa.list_namespaced_horizontal_pod_autoscaler(NS).items[0]
    assert got.spec.metrics[0].resource.target.average_utilization == 70
    with pytest.raises(ApiException) as err:
        hpa.create_namespaced_horizontal_pod_autoscaler(NS, {
            "metadata": {"name": "bad"}, "spec": {"scaleTargetRef": {
                "kind": "Deployment", "name": "x"}, "maxReplicas": 0}})
    assert err.value.status == 422


def test_subprocess_sandbox_driven_over_http(sandbox_process) -> None:
    url, kc = sandbox_process
    api = config.new_client_from_config(config_file=str(kc))
    try:
        core = client.CoreV1Api(api)
        assert "default" in [n.metadata.name for n in core.list_namespace().items]
        req = urllib.request.Request(url + "/_sandbox/faults", method="POST", data=json.dumps(
            {"method": "GET", "path": "/api/v1/namespaces$", "status": 502, "count": 1}).encode())
        rules = json.loads(urllib.request.urlopen(req).read())["faults"]
        assert rules[0]["status"] == 502
        with pytest.raises(ApiException) as err:
            core.list_namespace()
        assert err.value.status == 502
        core.list_namespace()
        urllib.request.urlopen(urllib.request.Request(url + "/_sandbox/faults",
                                                      method="DELETE")).read()
        listed = json.loads(urllib.request.urlopen(url + "/_sandbox/faults").read())
        assert listed == {"faults": []}
    finally:
        api.close()


def test_kubeconfig_loads_with_the_official_loader(sandbox, sandbox_kubeconfig) -> None:
    cfg = client.Configuration()
    config.load_kube_config(config_file=str(sandbox_kubeconfig), client_configuration=cfg)
    assert cfg.host == sandbox.url
    with client.ApiClient(cfg) as api:
        assert client.VersionApi(api).get_code().git_version.startswith("v1.33")


def test_a_sandbox_bug_is_a_500_status_and_requests_are_logged(sandbox, core, monkeypatch,
                                                                capsys) -> None:
    import io

    log = io.StringIO()
    sandbox.access_log = log

    def broken(*args, **kwargs):
        raise RuntimeError("boom")

    monkeypatch.setattr(sandbox.api, "list", broken)
    with pytest.raises(ApiException) as err:
        core.list_namespaced_pod(NS)
    st = json.loads(err.value.body)
    assert err.value.status == 500 and st["reason"] == "InternalError" and "boom" in st["message"]
    assert "RuntimeError: boom" in capsys.readouterr().err    # traceback on stderr
    assert core.read_namespace(NS).metadata.name == NS        # the server keeps serving
    lines = log.getvalue().splitlines()
    assert lines[0].startswith(tuple("0123456789")) and " GET /api/v1/namespaces/default/pods" \
        in lines[0] and " 500 " in lines[0]
