"""`ratefit check` end to end with real parts: the sandbox API server (CRD, the INVENTED
Kestrel Post workloads and their policies), the real Prometheus holding the scenario's
history (its request counter and cAdvisor series), a real `ratefit serve` with a token,
and `ratefit check` run as a subprocess.

What is expected comes from outside the tool: the rate of a workload is recomputed here
with the scenario's own ``workload`` label (max over pods of the p95 of each pod's 2m rate
over 1 h; Prometheus docs "Subquery", ``quantile_over_time``); a SelfSubjectAccessReview is
the authorization.k8s.io/v1 shape (spec.resourceAttributes {group, resource, subresource,
verb, namespace} → status.allowed; Kubernetes docs "Checking API access").
"""

from __future__ import annotations

import http.server
import json
import subprocess
import sys
import threading
from pathlib import Path

import httpx
import pytest

from api_fixtures import serve_process
from reconcile_fixtures import CRD, policy
from ratefit.controller.permissions import CONTROLLER_PERMISSIONS, LEASE_PERMISSIONS, all_permissions
from ratefit.models.scenario.services import REQUEST_METRIC, SCENARIO
from test_integration_plan import write_truth_store

pytestmark = pytest.mark.prometheus

RATEFIT = Path(sys.executable).with_name("ratefit")
TOKEN = "kestrel-check-token"


def scenario_policies() -> list[dict]:
    return [policy(s.namespace, s.workload, workload=s.workload, kind=s.kind, mode="DryRun",
                   containers=[{"name": c.name, "model": f"{s.namespace}/{s.workload}/{c.name}"} for c in s.containers])
            for s in SCENARIO]


@pytest.fixture(scope="module")
def world(scenario_prometheus, tmp_path_factory):
    from ratefit.controller.sandbox import SandboxServer
    from ratefit.models.scenario.manifests import manifest_objects

    tmp = tmp_path_factory.mktemp("check")
    write_truth_store(tmp / "store")
    sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD]).start()
    try:
        for objs in manifest_objects().values():
            for o in objs:
                if o["kind"] != "Service":
                    sb.create(o)
        sb.create({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": "ratefit-system"}})
        for p in scenario_policies():
            sb.create(p)
        # a Deployment that serves nothing Prometheus knows of: its pods have no series
        first = SCENARIO[0]
        ghost = json.loads(json.dumps(next(o for objs in manifest_objects().values() for o in objs
                                           if o["kind"] == "Deployment")))
        ghost["metadata"] = {"name": "ghost-api", "namespace": first.namespace}
        ghost["spec"]["selector"] = {"matchLabels": {"app": "ghost-api"}}
        ghost["spec"]["template"]["metadata"] = {"labels": {"app": "ghost-api"}}
        sb.create(ghost)
        cname = ghost["spec"]["template"]["spec"]["containers"][0]["name"]
        sb.create(policy(first.namespace, "ghost-api", workload="ghost-api", mode="DryRun",
                         containers=[{"name": cname, "model": f"{first.namespace}/ghost-api/{cname}"}]))
        # a policy whose rateQuery reads another namespace's series: refused, never sent
        sb.create(policy("parcels", "nosy", workload="label-printer", mode="DryRun",
                         containers=[{"name": "app", "model": "parcels/label-printer/app",
                                      "rateQuery": f'sum by (pod) (rate({REQUEST_METRIC}{{namespace="dispatch"}}[2m]))'}]))
        kc = sb.write_kubeconfig(tmp / "kubeconfig")
        with serve_process(tmp / "store", token=TOKEN, workdir=tmp) as api:
            (tmp / "token").write_text(TOKEN + "\n")
            (tmp / "wrong").write_text("not-the-token\n")
            yield {"prom": scenario_prometheus, "kc": kc, "api": api.base_url, "tmp": tmp, "sandbox": sb,
                   "ghost": f"{first.namespace}/ghost-api/{cname}"}
    finally:
        sb.stop()


def check(w, *extra: str, token: str = "token", kubeconfig: Path | None = None) -> tuple[int, dict, str]:
    args = [str(RATEFIT), "check", "--kubeconfig", str(kubeconfig or w["kc"]), "--prometheus", w["prom"].url,
            "--rate-metric", REQUEST_METRIC, "--rate-at", str(w["prom"].end), "--sizing-api", w["api"],
            "--sizing-token-file", str(w["tmp"] / token), *extra]
    p = subprocess.run(args + ["--output", "json"], capture_output=True, text=True, timeout=180)
    assert p.returncode in (0, 1), p.stderr
    assert p.stdout.strip(), p.stderr
    return p.returncode, json.loads(p.stdout), p.stderr


def lines(doc: dict, check: str, subject: str | None = None) -> list[dict]:
    return [c for c in doc["checks"] if c["check"] == check and (subject is None or c["subject"] == subject)]


def independent_rate(prom_url: str, at: float, ns: str, wl: str) -> float:
    q = (f'max(quantile_over_time(0.95, sum by (pod) (rate({REQUEST_METRIC}{{namespace="{ns}",workload="{wl}"}}[2m]))'
         f"[1h:30s]))")
    r = httpx.post(prom_url + "/api/v1/query", data={"query": q, "time": f"{at:.3f}"}, timeout=30)
    return float(r.json()["data"]["result"][0]["value"][1])


def test_check_reports_every_part_and_fails_the_policy_without_series(world):
    code, doc, _ = check(world)
    assert code == 1 and doc["ok"] is False  # the ghost policy FAILs
    status = {c["check"]: c["status"] for c in doc["checks"] if not c["subject"]}
    assert status["kubeconfig"] == "OK" and status["crd"] == "OK" and status["lease namespace"] == "OK"
    assert status["prometheus"] == "OK" and status["sizing api"] == "OK" and status["policies"] == "OK"
    perm = lines(doc, "permissions") + lines(doc, "permission")
    # the sandbox may or may not answer SelfSubjectAccessReview; either way the line says so
    assert perm and all(c["status"] in ("OK", "WARN") for c in perm)
    assert perm[0]["status"] == "OK" or "SelfSubjectAccessReview" in perm[0]["detail"]
    ghost = world["ghost"]
    # the policy whose pods have no series: a clear FAIL naming the query
    cpu = lines(doc, "cpu series", ghost)[0]
    assert cpu["status"] == "FAIL" and "container_cpu_usage_seconds_total" in cpu["query"]
    assert 'pod=~"^ghost-api-' in cpu["query"] and "cadvisor" in cpu["fix"].lower()
    rate = lines(doc, "request rate", ghost)[0]
    assert rate["status"] == "FAIL" and rate["detail"].startswith("NoMetrics")
    assert REQUEST_METRIC in rate["query"] and "ghost-api" in rate["query"]
    nosy = lines(doc, "request rate", "parcels/nosy/app")[0]
    assert nosy["status"] == "FAIL" and nosy["detail"].startswith("QueryRefused")
    assert 'namespace="dispatch"' in nosy["detail"] and 'namespace="parcels"' in nosy["fix"]
    model = lines(doc, "model", ghost)[0]
    assert model["status"] == "FAIL" and "train" in model["fix"]
    # every scenario container: series, a rate (the query printed), a model with the rate inside its range
    for s in SCENARIO:
        want = independent_rate(world["prom"].url, world["prom"].end, s.namespace, s.workload)
        for c in s.containers:
            key = f"{s.namespace}/{s.workload}/{c.name}"
            assert lines(doc, "cpu series", key)[0]["status"] == "OK"
            r = lines(doc, "request rate", key)[0]
            assert r["status"] == "OK" and "quantile_over_time(0.95" in r["query"] and "pod=~" in r["query"]
            assert float(r["detail"].split()[0]) == pytest.approx(want, rel=1e-3)
            assert lines(doc, "model", key)[0]["status"] == "OK"


def test_text_output_prints_status_fix_and_query(world):
    p = subprocess.run([str(RATEFIT), "check", "--kubeconfig", str(world["kc"]), "--prometheus", world["prom"].url,
                        "--rate-metric", REQUEST_METRIC, "--rate-at", str(world["prom"].end),
                        "--sizing-api", world["api"], "--sizing-token-file", str(world["tmp"] / "token")],
                       capture_output=True, text=True, timeout=180)
    assert p.returncode == 1
    out = p.stdout.splitlines()
    fail = next(i for i, ln in enumerate(out) if ln.startswith("FAIL") and "request rate" in ln and "ghost-api" in ln)
    assert out[fail + 1].strip().startswith("query: quantile_over_time(") and out[fail + 2].strip().startswith("fix:")
    assert all(ln[:4] in ("OK  ", "WARN", "FAIL", "    ") for ln in out)


def test_wrong_token_missing_lease_namespace_and_crd(world, tmp_path):
    code, doc, _ = check(world, "--lease-namespace", "no-such-ns", "--namespace", "dispatch", token="wrong")
    assert code == 1
    assert lines(doc, "sizing api")[0]["status"] == "FAIL" and "token" in lines(doc, "sizing api")[0]["detail"]
    assert lines(doc, "lease namespace")[0]["status"] == "FAIL" and "no-such-ns" in lines(doc, "lease namespace")[0]["fix"]
    # a cluster without the CRD
    from ratefit.controller.sandbox import SandboxServer

    bare = SandboxServer(host="127.0.0.1", port=0).start()
    try:
        code, doc, _ = check(world, kubeconfig=bare.write_kubeconfig(tmp_path / "bare"))
    finally:
        bare.stop()
    assert code == 1
    crd = lines(doc, "crd")[0]
    assert crd["status"] == "FAIL" and "kubectl apply -k manifests/crd" in crd["fix"]


class SSARProxy:
    """A loopback stand-in for an API server that answers SelfSubjectAccessReview (allow
    all but ``deny``), forwarding every other request to the sandbox."""

    def __init__(self, upstream: str, deny: set[tuple[str, str, str]]) -> None:
        outer = self
        self.reviews: list[dict] = []

        class H(http.server.BaseHTTPRequestHandler):
            def _any(self) -> None:
                n = int(self.headers.get("content-length") or 0)
                body = self.rfile.read(n) if n else b""
                if self.path.startswith("/apis/authorization.k8s.io/v1/selfsubjectaccessreviews"):
                    doc = json.loads(body)
                    outer.reviews.append(doc)
                    a = doc["spec"]["resourceAttributes"]
                    res = a["resource"] + ("/" + a["subresource"] if a.get("subresource") else "")
                    allowed = (a.get("group", ""), res, a["verb"]) not in deny
                    doc["status"] = {"allowed": allowed, **({} if allowed else {"reason": "no RBAC rule"})}
                    out, code = json.dumps(doc).encode(), 201
                else:
                    r = httpx.request(self.command, upstream + self.path, content=body or None,
                                      headers={k: v for k, v in self.headers.items() if k.lower() != "host"})
                    out, code = r.content, r.status_code
                self.send_response(code)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(out)))
                self.end_headers()
                self.wfile.write(out)

            do_GET = do_POST = _any

            def log_message(self, *a: object) -> None:
                pass

        self.httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), H)
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}"
        threading.Thread(target=self.httpd.serve_forever, daemon=True).start()

    def close(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()


def test_permissions_by_selfsubjectaccessreview(world, tmp_path):
    sb = world["sandbox"]
    kc = Path(world["kc"]).read_text().replace(sb.url, "@@")
    # denied: patch deployments (in both watched namespaces) and create leases (in the Lease namespace)
    for deny, expect_fail in (({}, 0), ({("apps", "deployments", "patch"), ("coordination.k8s.io", "leases", "create")}, 3)):
        proxy = SSARProxy(sb.url, set(deny))
        try:
            path = tmp_path / f"kc-{expect_fail}"
            path.write_text(kc.replace("@@", proxy.url))
            code, doc, _ = check(world, "--namespace", "dispatch", "--namespace", "parcels", kubeconfig=path)
        finally:
            proxy.close()
        perm = lines(doc, "permission")
        assert len(perm) == expect_fail
        if not expect_fail:
            assert lines(doc, "permissions")[0]["status"] == "OK"
            # one review per permission per watched namespace; the Lease's only in its namespace
            assert len(proxy.reviews) == 2 * len(CONTROLLER_PERMISSIONS) + len(LEASE_PERMISSIONS)
            lease = [r["spec"]["resourceAttributes"] for r in proxy.reviews
                     if r["spec"]["resourceAttributes"]["resource"] == "leases"]
            assert {a["namespace"] for a in lease} == {"ratefit-system"}
            resize = [r["spec"]["resourceAttributes"] for r in proxy.reviews
                      if r["spec"]["resourceAttributes"].get("subresource") == "resize"]
            assert resize and resize[0]["resource"] == "pods" and resize[0]["verb"] == "patch"
        else:
            texts = " ".join(c["detail"] for c in perm)
            assert "patch deployments (apps)" in texts and "create leases (coordination.k8s.io)" in texts
            assert all(c["status"] == "FAIL" for c in perm) and code == 1


def test_permission_list_matches_the_rbac_manifest():
    """Every permission in the one list is granted by manifests/base/rbac.yaml (the Lease's
    by the Role in the Lease namespace)."""
    import yaml

    docs = list(yaml.safe_load_all((Path(__file__).resolve().parents[1] / "manifests/base/rbac.yaml").read_text()))
    granted: dict[str, set[tuple[str, str, str]]] = {"ClusterRole": set(), "Role": set()}
    for d in docs:
        if d and d["kind"] in granted:
            for rule in d["rules"]:
                for g in rule["apiGroups"]:
                    for r in rule["resources"]:
                        for v in rule["verbs"]:
                            granted[d["kind"]].add((g, r, v))
    for p in all_permissions():
        assert (p.group, p.resource, p.verb) in granted["Role" if p.lease else "ClusterRole"], p.text


def test_store_instead_of_the_sizing_api(world):
    p = subprocess.run([str(RATEFIT), "check", "--kubeconfig", str(world["kc"]), "--prometheus", world["prom"].url,
                        "--rate-metric", REQUEST_METRIC, "--rate-at", str(world["prom"].end),
                        "--store", str(world["tmp"] / "store"), "--output", "json"],
                       capture_output=True, text=True, timeout=180)
    doc = json.loads(p.stdout)
    store = lines(doc, "model store")[0]
    n = sum(len(s.containers) for s in SCENARIO)
    assert store["status"] == "OK" and f"{n} models" in store["detail"]
    s = SCENARIO[0]
    key = f"{s.namespace}/{s.workload}/{s.containers[0].name}"
    assert lines(doc, "model", key)[0]["status"] == "OK" and "inside its trained range" in lines(doc, "model", key)[0]["detail"]
    assert lines(doc, "model", world["ghost"])[0]["status"] == "FAIL" and p.returncode == 1
    bad = subprocess.run([str(RATEFIT), "check", "--prometheus", world["prom"].url, "--store", "x", "--sizing-api", "http://127.0.0.1:1"],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "not both" in bad.stderr
