"""SelfSubjectAccessReview in the sandbox (issue 11), with the real clients:

- the official `kubernetes` client's `AuthorizationV1Api.create_self_subject_access_review`
  (the API reference: POST /apis/authorization.k8s.io/v1/selfsubjectaccessreviews,
  answer `status.allowed`, `status.denied`, `status.reason`) — allowed by default;
- the real `kubectl auth can-i` (kubectl reference: prints "yes"/"no", exit code 0/1),
  which also resolves the resource through discovery;
- deny rules (the fault mode) make the review answer "no" and the matching request fail
  with 403 Forbidden, as RBAC would; set in-process, over HTTP and with `--deny`;
- the request log carries each request's authorization attributes, with the verbs the
  Kubernetes docs give for each HTTP method ("Authorization" → "Determine the request verb").
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import httpx
import pytest
from kubernetes import client
from kubernetes.client.rest import ApiException

from ratefit.controller.local_servers import stop_process
from ratefit.controller.sandbox.access import Attributes, parse_deny, request_attributes
from ratefit.controller.sandbox.server import SandboxServer

RATEFIT = [sys.executable, "-m", "ratefit.controller.cli"]


def _review(api: client.ApiClient, **attrs: str) -> client.V1SelfSubjectAccessReview:
    body = client.V1SelfSubjectAccessReview(
        spec=client.V1SelfSubjectAccessReviewSpec(resource_attributes=client.V1ResourceAttributes(**attrs)))
    return client.AuthorizationV1Api(api).create_self_subject_access_review(body)


def test_review_allows_everything_by_default(sandbox_api) -> None:
    got = _review(sandbox_api, verb="patch", group="apps", resource="deployments", namespace="depot")
    assert got.status.allowed is True and not got.status.denied
    assert got.spec.resource_attributes.resource == "deployments"  # the spec is echoed back
    nr = client.AuthorizationV1Api(sandbox_api).create_self_subject_access_review(
        client.V1SelfSubjectAccessReview(spec=client.V1SelfSubjectAccessReviewSpec(
            non_resource_attributes=client.V1NonResourceAttributes(path="/healthz", verb="get"))))
    assert nr.status.allowed is True


def test_deny_rule_answers_no_and_the_request_gets_403(sandbox: SandboxServer, sandbox_api) -> None:
    sandbox.create({"apiVersion": "apps/v1", "kind": "Deployment",
                    "metadata": {"name": "sorter", "namespace": "depot"},
                    "spec": {"selector": {"matchLabels": {"app": "sorter"}},
                             "template": {"metadata": {"labels": {"app": "sorter"}},
                                          "spec": {"containers": [{"name": "main", "image": "x"}]}}}})
    sandbox.access.deny("patch", "deployments", group="apps", subresource="")
    got = _review(sandbox_api, verb="patch", group="apps", resource="deployments", namespace="depot")
    assert got.status.allowed is False and got.status.denied is True and "deny rule" in got.status.reason
    # other verbs, other resources and the subresource are still allowed (RBAC matches exactly)
    assert _review(sandbox_api, verb="get", group="apps", resource="deployments").status.allowed
    assert _review(sandbox_api, verb="patch", group="apps", resource="statefulsets").status.allowed
    assert _review(sandbox_api, verb="patch", group="apps", resource="deployments",
                   subresource="status").status.allowed
    apps = client.AppsV1Api(sandbox_api)
    with pytest.raises(ApiException) as exc:
        apps.patch_namespaced_deployment("sorter", "depot", {"metadata": {"labels": {"a": "b"}}})
    assert exc.value.status == 403
    assert json.loads(exc.value.body)["reason"] == "Forbidden"
    assert apps.read_namespaced_deployment("sorter", "depot").metadata.name == "sorter"
    sandbox.access.clear()
    apps.patch_namespaced_deployment("sorter", "depot", {"metadata": {"labels": {"a": "b"}}})


def test_deny_rules_over_http_and_malformed_reviews(sandbox: SandboxServer) -> None:
    url = sandbox.url
    r = httpx.post(url + "/_sandbox/access", json={"verb": "create", "group": "coordination.k8s.io",
                                                   "resource": "leases", "namespace": "ratefit-system"})
    assert r.status_code == 201
    assert httpx.get(url + "/_sandbox/access").json()["deny"][0]["resource"] == "leases"
    ssar = url + "/apis/authorization.k8s.io/v1/selfsubjectaccessreviews"

    def ask(ns: str) -> dict:
        return httpx.post(ssar, json={"apiVersion": "authorization.k8s.io/v1", "kind": "SelfSubjectAccessReview",
                                      "spec": {"resourceAttributes": {"verb": "create", "group": "coordination.k8s.io",
                                                                      "resource": "leases", "namespace": ns}}}).json()

    assert ask("ratefit-system")["status"]["allowed"] is False
    assert ask("elsewhere")["status"]["allowed"] is True  # the rule names one namespace
    assert httpx.post(url + "/_sandbox/access", json={"verbs": "x"}).status_code == 400
    both = httpx.post(ssar, json={"spec": {"resourceAttributes": {"verb": "get"},
                                           "nonResourceAttributes": {"path": "/x", "verb": "get"}}})
    assert both.status_code == 422 and both.json()["reason"] == "Invalid"
    assert httpx.get(ssar).status_code == 405
    assert httpx.delete(url + "/_sandbox/access").json() == {"deny": []}
    assert ask("ratefit-system")["status"]["allowed"] is True


def test_kubectl_auth_can_i(sandbox: SandboxServer, kubectl) -> None:
    yes = kubectl("auth", "can-i", "patch", "deployments.apps", "-n", "depot")
    assert (yes.returncode, yes.stdout.strip()) == (0, "yes"), yes.stderr
    sandbox.access.deny("patch", "deployments", group="apps", subresource="")
    no = kubectl("auth", "can-i", "patch", "deployments.apps", "-n", "depot")
    # kubectl prints the review's reason after "no - "
    assert (no.returncode, no.stdout.strip()) == (1, "no - sandbox deny rule patch:deployments.apps "
                                                     "(fault injection)"), no.stderr
    # a subresource, spelt the kubectl way
    assert kubectl("auth", "can-i", "patch", "pods", "--subresource=resize", "-n", "depot").stdout.strip() == "yes"
    sandbox.access.deny("patch", "pods", group="", subresource="resize")
    assert kubectl("auth", "can-i", "patch", "pods", "--subresource=resize", "-n", "depot").stdout.startswith("no")
    # a rule for one namespace: the namespace kubectl sends is read (protobuf field 1)
    sandbox.access.deny("get", "pods", group="", subresource="", namespace="depot")
    assert kubectl("auth", "can-i", "get", "pods", "-n", "depot").stdout.startswith("no")
    assert kubectl("auth", "can-i", "get", "pods", "-n", "elsewhere").stdout.strip() == "yes"
    # cluster-wide (no namespace in the review)
    assert kubectl("auth", "can-i", "list", "deployments.apps", "-A").stdout.strip() == "yes"


def test_sandbox_cli_deny_flag(tmp_path: Path) -> None:
    import shutil

    if shutil.which("kubectl") is None:
        pytest.skip("kubectl is not installed")
    kc = tmp_path / "kc"
    bad = subprocess.run([*RATEFIT, "sandbox", "--kubeconfig", str(kc), "--deny", "patch"],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "expected VERB:RESOURCE" in bad.stderr and not kc.exists()
    proc = subprocess.Popen([*RATEFIT, "sandbox", "--kubeconfig", str(kc), "--deny", "patch:pods/resize",
                             "--deny", "update:leases.coordination.k8s.io"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        assert proc.stdout.readline().startswith("http://127.0.0.1:")

        def can_i(*args: str) -> str:
            return subprocess.run(["kubectl", "--kubeconfig", str(kc), "auth", "can-i", *args],
                                  capture_output=True, text=True, timeout=60).stdout.strip()

        assert can_i("patch", "pods", "--subresource=resize").startswith("no")
        assert can_i("patch", "pods") == "yes"
        assert can_i("update", "leases.coordination.k8s.io", "-n", "ratefit-system").startswith("no")
        assert can_i("get", "leases.coordination.k8s.io", "-n", "ratefit-system") == "yes"
    finally:
        stop_process(proc)


@pytest.mark.parametrize(("method", "path", "query", "want"), [
    ("GET", "/apis/apps/v1/namespaces/a/deployments", {}, Attributes("list", "apps", "deployments", namespace="a")),
    ("GET", "/apis/apps/v1/deployments", {"watch": ["true"]}, Attributes("watch", "apps", "deployments")),
    ("GET", "/apis/apps/v1/namespaces/a/deployments/d", {}, Attributes("get", "apps", "deployments", namespace="a", name="d")),
    ("PATCH", "/api/v1/namespaces/a/pods/p/resize", {}, Attributes("patch", "", "pods", "resize", "a", "p")),
    ("PUT", "/apis/coordination.k8s.io/v1/namespaces/s/leases/l", {}, Attributes("update", "coordination.k8s.io", "leases", namespace="s", name="l")),
    ("POST", "/apis/events.k8s.io/v1/namespaces/a/events", {}, Attributes("create", "events.k8s.io", "events", namespace="a")),
    ("DELETE", "/api/v1/namespaces/a/pods", {}, Attributes("deletecollection", "", "pods", namespace="a")),
    ("DELETE", "/api/v1/namespaces/a/pods/p", {}, Attributes("delete", "", "pods", namespace="a", name="p")),
    ("GET", "/api/v1/namespaces/kube-system", {}, Attributes("get", "", "namespaces", namespace="kube-system", name="kube-system")),
    ("PATCH", "/apis/ratefit.dev/v1alpha1/namespaces/a/sizingpolicies/x/status", {},
     Attributes("patch", "ratefit.dev", "sizingpolicies", "status", "a", "x")),
    ("GET", "/apis/apps/v1", {}, Attributes("get", non_resource_url="/apis/apps/v1")),
    ("GET", "/version", {}, Attributes("get", non_resource_url="/version")),
])
def test_request_attributes_follow_the_docs(method: str, path: str, query: dict, want: Attributes) -> None:
    assert request_attributes(method, path, query) == want


def test_request_log_carries_attributes(sandbox: SandboxServer, sandbox_api) -> None:
    sandbox.clear_requests()
    client.CoreV1Api(sandbox_api).list_namespaced_pod("default")
    client.VersionApi(sandbox_api).get_code()
    (entry,) = [e for e in sandbox.requests if e["path"] == "/api/v1/namespaces/default/pods"]
    assert entry["attributes"] == {"verb": "list", "resource": "pods", "namespace": "default"}
    (version,) = [e for e in sandbox.requests if e["path"] == "/version"]
    assert version["attributes"] == {"verb": "get", "nonResourceURL": "/version"}
    over_http = httpx.get(sandbox.url + "/_sandbox/requests").json()["requests"]
    assert {"verb": "list", "resource": "pods", "namespace": "default"} in [e.get("attributes") for e in over_http]


def test_parse_deny_spelling() -> None:
    assert parse_deny("patch:deployments.apps") == {"verb": "patch", "resource": "deployments",
                                                    "group": "apps", "subresource": ""}
    assert parse_deny("patch:pods/resize")["subresource"] == "resize"
    assert parse_deny("get:*") == {"verb": "get", "resource": "*", "group": "*", "subresource": "*"}
    with pytest.raises(ValueError):
        parse_deny("deployments")
