"""The end-to-end flow against a REAL cluster: set RATEFIT_CLUSTER_KUBECONFIG (skipped otherwise).

Needs the SizingPolicy CRD installed (manifests/crd/sizingpolicy.yaml). The test works in
a namespace of its own (`ratefit-e2e-<random>`, deleted at the end): a Deployment with
replicas 0 (nothing is scheduled), a SizingPolicy in apply mode, rates replayed from a
history file and a real `ratefit serve` on loopback. It checks what the sandbox tests
check: `ratefit plan` changes nothing; `ratefit run --once` patches the container to
ceil5(upper × 1.15) (DESIGN.md "One decision", step 3); a second run changes nothing.
(It can also be pointed at a sandbox kubeconfig to try it out.)
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import deployment, policy, shared_sizing_api, write_history  # noqa: F401
from ratefit.controller.quantity import parse_cpu

pytestmark = pytest.mark.cluster
RATEFIT = Path(sys.executable).with_name("ratefit")


@pytest.fixture
def cluster():
    kc = os.environ.get("RATEFIT_CLUSTER_KUBECONFIG")
    if not kc:
        pytest.skip("set RATEFIT_CLUSTER_KUBECONFIG to run the end-to-end flow against a real cluster")
    from kubernetes import client, config

    cfg = client.Configuration()
    config.load_kube_config(config_file=kc, client_configuration=cfg)
    api = client.ApiClient(cfg)
    ns = f"ratefit-e2e-{uuid.uuid4().hex[:6]}"
    client.CoreV1Api(api).create_namespace({"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": ns}})
    try:
        yield kc, api, ns
    finally:
        try:
            client.CoreV1Api(api).delete_namespace(ns)
        finally:
            api.close()


def _rvs(api, ns: str) -> dict[str, str]:
    from kubernetes import client

    out = {f"deploy/{d.metadata.name}": d.metadata.resource_version
           for d in client.AppsV1Api(api).list_namespaced_deployment(ns).items}
    pols = client.CustomObjectsApi(api).list_namespaced_custom_object("ratefit.dev", "v1alpha1", ns, "sizingpolicies")
    out.update({f"policy/{p['metadata']['name']}": p["metadata"]["resourceVersion"] for p in pols["items"]})
    return out


def test_end_to_end_against_a_real_cluster(cluster, shared_sizing_api, tmp_path) -> None:
    from kubernetes import client

    kc, api, ns = cluster
    dep = deployment(ns, "web", [("app", "100m", "200m")], replicas=0)
    client.AppsV1Api(api).create_namespaced_deployment(ns, dep)
    # the shared sizing API serves shop/web/app: cpu = 0.05 + 0.004 × rate, band 0.02 cores
    pol = policy(ns, "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])
    client.CustomObjectsApi(api).create_namespaced_custom_object("ratefit.dev", "v1alpha1", ns, "sizingpolicies", pol)
    at = float(int(time.time() - 120))
    history = write_history(tmp_path / "history.om", {(ns, "web"): [50.0]}, end=at)
    common = ["--kubeconfig", kc, "--replay", str(history), "--rate-at", str(at), "--sizing-api", shared_sizing_api,
              "--namespace", ns]

    before = _rvs(api, ns)
    p = subprocess.run([str(RATEFIT), "plan", *common, "-o", "json"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    (row,) = json.loads(p.stdout)
    assert (row["verdict"], row["proposed_m"]) == ("proposed", 315)  # ceil5(270 × 1.15)
    assert _rvs(api, ns) == before  # plan changes nothing

    run = [str(RATEFIT), "run", *common, "--once", "--no-leader-election", "--metrics-port", "-1"]
    r = subprocess.run(run, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    d = client.AppsV1Api(api).read_namespaced_deployment("web", ns)
    res = d.spec.template.spec.containers[0].resources
    assert parse_cpu(res.requests["cpu"]) == 315 and parse_cpu(res.limits["cpu"]) == 630
    assert json.loads(d.metadata.annotations["ratefit.dev/previous-requests"]) == {
        "app": {"cpu_request": "100m", "cpu_limit": "200m"}}
    rv = d.metadata.resource_version
    for _ in range(2):  # the second run records the new state once, the third writes nothing
        r2 = subprocess.run(run, capture_output=True, text=True, timeout=120)
        assert r2.returncode == 0, r2.stderr
    assert client.AppsV1Api(api).read_namespaced_deployment("web", ns).metadata.resource_version == rv
