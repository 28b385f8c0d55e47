"""The real `kubectl` against the sandbox through the kubeconfig it writes.

What kubectl prints and sends is kubectl's own behaviour (kubectl reference docs:
`kubectl get`, `apply`, `patch`, `--dry-run=server`); these tests check the sandbox
answers it the way an API server would. kubectl gets its field-validation support
from the sandbox's minimal `/openapi/v3` documents, so `kubectl apply -f` works
without `--validate=false`.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

REPO = Path(__file__).resolve().parents[1]

APP = """\
apiVersion: apps/v1
kind: Deployment
metadata:
  name: label-printer
  labels: {app: label-printer}
spec:
  replicas: 2
  selector: {matchLabels: {app: label-printer}}
  template:
    metadata: {labels: {app: label-printer}}
    spec:
      containers:
      - name: printer
        image: registry.example/label-printer:3.1
        env: [{name: QUEUE, value: parcels}]
        resources:
          requests: {cpu: 300m, memory: 128Mi}
          limits: {cpu: "1", memory: 256Mi}
      - name: metrics
        image: registry.example/exporter:1
        resources: {requests: {cpu: 50m}}
"""


@pytest.fixture
def app_file(tmp_path: Path) -> Path:
    f = tmp_path / "app.yaml"
    f.write_text(APP)
    return f


def test_apply_then_get_deployments_and_pods(kubectl, app_file, sandbox) -> None:
    out = kubectl("apply", "-f", str(app_file), check=True)
    assert "deployment.apps/label-printer created" in out.stdout
    again = kubectl("apply", "-f", str(app_file), check=True)
    assert "deployment.apps/label-printer unchanged" in again.stdout
    table = kubectl("get", "deployments,pods", check=True).stdout
    assert "deployment.apps/label-printer   2/2" in table
    assert table.count("pod/label-printer-") == 2 and "Running" in table
    listed = json.loads(kubectl("get", "pods", "-l", "app=label-printer", "-o", "json",
                                check=True).stdout)
    assert len(listed["items"]) == 2
    stored = sandbox.store.get("apps", "deployments", "default", "label-printer")
    # kubectl apply keeps its last-applied-configuration annotation (kubectl apply docs)
    assert "kubectl.kubernetes.io/last-applied-configuration" in stored["metadata"]["annotations"]


def test_apply_change_is_a_strategic_patch(kubectl, app_file, sandbox) -> None:
    kubectl("apply", "-f", str(app_file), check=True)
    app_file.write_text(APP.replace("cpu: 300m", "cpu: 400m"))
    out = kubectl("apply", "-f", str(app_file), check=True)
    assert "configured" in out.stdout
    patches = [r for r in sandbox.requests if r["method"] == "PATCH"]
    assert patches[-1]["contentType"].startswith("application/strategic-merge-patch+json")
    c = sandbox.store.get("apps", "deployments", "default", "label-printer")["spec"][
        "template"]["spec"]["containers"]
    assert c[0]["resources"]["requests"]["cpu"] == "400m" and c[1]["name"] == "metrics"


def test_patch_strategic_and_server_dry_run(kubectl, app_file, sandbox) -> None:
    kubectl("apply", "-f", str(app_file), check=True)
    patch = json.dumps({"spec": {"template": {"spec": {"containers": [
        {"name": "printer", "resources": {"requests": {"cpu": "0.6"}}}]}}}})
    rv = sandbox.store.get("apps", "deployments", "default", "label-printer")["metadata"][
        "resourceVersion"]
    dry = kubectl("patch", "deployment", "label-printer", "--type", "strategic", "-p", patch,
                  "--dry-run=server", "-o", "json", check=True)
    shown = json.loads(dry.stdout)["spec"]["template"]["spec"]["containers"][0]
    assert shown["resources"]["requests"]["cpu"] == "600m"   # canonical form
    assert sandbox.store.get("apps", "deployments", "default", "label-printer")["metadata"][
        "resourceVersion"] == rv                               # nothing stored
    kubectl("patch", "deployment", "label-printer", "--type", "strategic", "-p", patch,
            check=True)
    c = sandbox.store.get("apps", "deployments", "default", "label-printer")["spec"][
        "template"]["spec"]["containers"]
    assert c[0]["resources"] == {"requests": {"cpu": "600m", "memory": "128Mi"},
                                 "limits": {"cpu": "1", "memory": "256Mi"}}
    assert c[0]["env"] == [{"name": "QUEUE", "value": "parcels"}]
    assert [x["name"] for x in c] == ["printer", "metrics"]


def test_request_above_limit_message_reaches_kubectl(kubectl, app_file) -> None:
    kubectl("apply", "-f", str(app_file), check=True)
    patch = json.dumps({"spec": {"template": {"spec": {"containers": [
        {"name": "printer", "resources": {"requests": {"cpu": "2"}}}]}}}})
    out = kubectl("patch", "deployment", "label-printer", "-p", patch)
    assert out.returncode != 0
    # the API server's wording (pkg/apis/core/validation/validation.go), as kubectl shows it
    assert ('spec.template.spec.containers[0].resources.requests: Invalid value: "2": must '
            'be less than or equal to cpu limit of 1') in out.stderr


def test_get_custom_objects_of_a_test_crd(kubectl, tmp_path, test_crd) -> None:
    f = tmp_path / "crd.yaml"
    f.write_text(yaml.safe_dump(test_crd))
    kubectl("apply", "-f", str(f), check=True)
    w = tmp_path / "w.yaml"
    w.write_text("apiVersion: example.test/v1\nkind: Widget\nmetadata: {name: blue}\n"
                 "spec: {size: 4}\n")
    kubectl("apply", "-f", str(w), check=True)
    table = kubectl("get", "widgets", check=True).stdout.splitlines()
    assert table[0].split() == ["NAME", "SIZE"]                # additionalPrinterColumns
    assert table[1].split() == ["blue", "4"]
    assert "blue" in kubectl("get", "wd", check=True).stdout   # short name from discovery
    bad = kubectl("patch", "widget", "blue", "--type", "merge", "-p", '{"spec":{"size":99}}')
    assert bad.returncode != 0 and "should be less than or equal to 10" in bad.stderr
    strategic = kubectl("patch", "widget", "blue", "-p", '{"spec":{"size":5}}')
    # custom resources do not take strategic merge patches (CRD docs) -> 415
    assert strategic.returncode != 0 and "not supported" in strategic.stderr
    ok = kubectl("patch", "widget", "blue", "--type", "merge", "-p", '{"spec":{"size":5}}')
    assert ok.returncode == 0


def test_real_sizingpolicy_crd_and_examples_load(kubectl, sandbox) -> None:
    crd = REPO / "manifests" / "crd"
    examples = REPO / "manifests" / "examples"
    sandbox.load([crd])
    loaded = sandbox.load([examples])
    out = kubectl("get", "sizingpolicies", "-A", check=True).stdout
    assert out.splitlines()[0].split()[:3] == ["NAMESPACE", "NAME", "WORKLOAD"]
    for obj in loaded:
        if obj["kind"] == "SizingPolicy":
            assert obj["metadata"]["name"] in out
    short = kubectl("get", "rfp", "-A", "-o", "name", check=True).stdout
    assert short.count("sizingpolicy.ratefit.dev/") == sum(
        1 for o in loaded if o["kind"] == "SizingPolicy")


def test_scale_rollout_status_events_and_delete(kubectl, app_file, sandbox_api) -> None:
    from kubernetes import client

    kubectl("apply", "-f", str(app_file), check=True)
    kubectl("scale", "deployment", "label-printer", "--replicas=3", check=True)  # /scale
    out = kubectl("rollout", "status", "deployment/label-printer", "--timeout=10s", check=True)
    assert 'deployment "label-printer" successfully rolled out' in out.stdout
    pods = kubectl("get", "pods", "-o", "name", check=True).stdout.split()
    assert len(pods) == 3
    # an event written through events.k8s.io/v1 is visible to `kubectl get events`
    # (core/v1): both APIs serve the same Event objects (Kubernetes docs, Event v1 API)
    client.EventsV1Api(sandbox_api).create_namespaced_event("default", {
        "metadata": {"name": "label-printer.1"}, "eventTime": "2026-01-01T00:00:00.000000Z",
        "reportingController": "ratefit.dev/controller", "reportingInstance": "test",
        "action": "Patch", "reason": "CPURequestChanged", "type": "Normal",
        "note": "printer cpu 300m -> 250m",
        "regarding": {"kind": "Deployment", "namespace": "default", "name": "label-printer"}})
    events = kubectl("get", "events", check=True).stdout
    assert "CPURequestChanged" in events and "deployment/label-printer" in events
    assert "printer cpu 300m -> 250m" in events
    kubectl("delete", "deployment", "label-printer", check=True)
    assert kubectl("get", "pods", "-o", "name", check=True).stdout.strip() == ""


def test_get_watch_streams_table_rows(kubectl, app_file) -> None:
    kubectl("apply", "-f", str(app_file), check=True)
    out = kubectl("get", "deployments", "-w", "--request-timeout=2s", timeout=20)
    lines = out.stdout.splitlines()
    assert lines[0].split()[:2] == ["NAME", "READY"]
    assert lines[1].startswith("label-printer")


def test_unknown_custom_fields_warn_or_fail_strictly(kubectl, tmp_path, test_crd) -> None:
    f = tmp_path / "crd.yaml"
    f.write_text(yaml.safe_dump(test_crd))
    kubectl("apply", "-f", str(f), check=True)
    w = tmp_path / "w.yaml"
    w.write_text("apiVersion: example.test/v1\nkind: Widget\nmetadata: {name: odd}\n"
                 "spec: {size: 4, colour: red}\n")
    # kubectl docs (--validate): "strict" (the default) fails on unknown fields, "warn"
    # warns and the API server prunes them (CRD docs "Field pruning")
    strict = kubectl("apply", "-f", str(w))
    assert strict.returncode != 0 and 'unknown field "spec.colour"' in strict.stderr
    warn = kubectl("apply", "--validate=warn", "-f", str(w))
    assert warn.returncode == 0 and 'unknown field "spec.colour"' in warn.stderr
    got = json.loads(kubectl("get", "widget", "odd", "-o", "json", check=True).stdout)
    assert "colour" not in got["spec"]


def test_protobuf_bodies_are_refused_plainly_and_yaml_works(kubectl, sandbox) -> None:
    # kubectl's `create namespace` generator sends application/vnd.kubernetes.protobuf
    # (client-go prefers protobuf for built-in kinds); the stand-in answers 415
    # UnsupportedMediaType naming what it accepts, and `create -f` (JSON) works.
    gen = kubectl("create", "namespace", "from-generator")
    assert gen.returncode != 0
    assert "UnsupportedMediaType" in gen.stderr and "application/json" in gen.stderr
    made = kubectl("create", "-f", "-", input="apiVersion: v1\nkind: Namespace\nmetadata: {name: from-file}\n", check=True)
    assert "from-file" in made.stdout
    assert sandbox.store.get("", "namespaces", None, "from-file") is not None
