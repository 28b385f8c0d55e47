"""Deploy manifests speak Kubernetes (issue 10): the recommended labels on every object,
ConfigMap keys with one prefix that reach `ratefit run`, and a training Job that runs
under its own read-only ServiceAccount.

- Labels: `app.kubernetes.io/name` and `app.kubernetes.io/component` are the
  recommended labels (Kubernetes docs, "Recommended Labels"); the Deployment's
  selector and the Service's selector use them, and the selector matches the pod
  template (a Deployment whose selector does not match its template is refused — API
  reference, DeploymentSpec.selector).
- `$(VAR)` in container args is expanded from the container's environment, which
  includes `envFrom` (Kubernetes docs, "Define dependent environment variables"): every
  `$(VAR)` must be defined, else it stays literally in the argument.
- The trainer's rights are computed from the rendered RBAC objects (a ClusterRoleBinding
  grants its ClusterRole's rules to the subjects — API reference, RBAC).
The example SizingPolicies in manifests/examples are the user's objects, not ratefit's
own, so they carry the user's labels, not these.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parent.parent
MANIFESTS = ROOT / "manifests"
COMPONENTS = {"controller", "crd", "trainer"}

pytestmark = pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")


def _render(path: Path) -> list[dict]:
    out = subprocess.run(["kubectl", "kustomize", str(path)], capture_output=True, text=True, check=True).stdout
    return [d for d in yaml.safe_load_all(out) if d]


def _everything() -> list[dict]:
    docs = _render(MANIFESTS / "overlays" / "dry-run")
    for path in sorted((MANIFESTS / "training").glob("*.yaml")):
        docs += [d for d in yaml.safe_load_all(path.read_text()) if d]
    monitoring = MANIFESTS / "monitoring" / "kustomization.yaml"
    if monitoring.is_file():
        docs += _render(monitoring.parent)
    return docs


def _component(doc: dict) -> str:
    return doc["metadata"]["labels"]["app.kubernetes.io/component"]


def test_every_object_has_the_recommended_labels() -> None:
    docs = _everything()
    assert len(docs) >= 12
    for d in docs:
        labels = d["metadata"].get("labels") or {}
        where = f"{d['kind']}/{d['metadata']['name']}"
        assert labels.get("app.kubernetes.io/name") == "ratefit", where
        assert labels.get("app.kubernetes.io/component") in COMPONENTS, where
    by_kind = {(d["kind"], d["metadata"]["name"]): _component(d) for d in docs}
    assert by_kind[("CustomResourceDefinition", "sizingpolicies.ratefit.dev")] == "crd"
    assert by_kind[("Deployment", "ratefit-controller")] == "controller"
    assert by_kind[("ServiceAccount", "ratefit-trainer")] == "trainer"
    jobs = [d for d in docs if d["kind"] in ("Job", "CronJob")]
    assert jobs and all(_component(j) == "trainer" for j in jobs)


def test_pod_templates_and_selectors_use_the_labels() -> None:
    docs = _everything()
    dep = next(d for d in docs if d["kind"] == "Deployment")
    tmpl = dep["spec"]["template"]["metadata"]["labels"]
    sel = dep["spec"]["selector"]["matchLabels"]
    assert sel == {"app.kubernetes.io/name": "ratefit", "app.kubernetes.io/component": "controller"}
    assert sel.items() <= tmpl.items()
    svc = next(d for d in docs if d["kind"] == "Service")
    assert svc["spec"]["selector"].items() <= tmpl.items()
    for job in (d for d in docs if d["kind"] == "Job"):
        assert job["spec"]["template"]["metadata"]["labels"]["app.kubernetes.io/component"] == "trainer"


def test_configmap_keys_are_prefixed_and_every_arg_variable_is_defined() -> None:
    docs = _render(MANIFESTS / "overlays" / "dry-run")
    (cm,) = [d for d in docs if d["kind"] == "ConfigMap"]
    assert cm["data"] and all(k.startswith("RATEFIT_") for k in cm["data"])
    spec = next(d for d in docs if d["kind"] == "Deployment")["spec"]["template"]["spec"]
    for c in spec["containers"]:
        env = {e["name"] for e in c.get("env") or []}
        for src in c.get("envFrom") or []:
            ref = src.get("configMapRef", {}).get("name")
            assert ref == cm["metadata"]["name"]
            env |= set(cm["data"])
        for arg in c.get("args") or []:
            for var in re.findall(r"\$\((\w+)\)", arg):
                assert var in env, f"{c['name']}: $({var}) in {arg!r} is not defined"
    # RATEFIT_DRY_RUN reaches `ratefit run` through envFrom (the flag's default)
    ctrl = next(c for c in spec["containers"] if c["name"] == "controller")
    assert any(s.get("configMapRef") for s in ctrl["envFrom"])


def _grants(docs: list[dict], sa: str) -> set[tuple[str, str, str]]:
    roles = {(d["kind"], d["metadata"]["name"]): d for d in docs if d["kind"] in ("ClusterRole", "Role")}
    out = set()
    for b in (d for d in docs if d["kind"] in ("ClusterRoleBinding", "RoleBinding")):
        if not any(s["kind"] == "ServiceAccount" and s["name"] == sa for s in b["subjects"]):
            continue
        role = roles[(b["roleRef"]["kind"], b["roleRef"]["name"])]
        out |= {(g, r, v) for rule in role["rules"] for g in rule["apiGroups"] for r in rule["resources"]
                for v in rule["verbs"]}
    return out


def test_training_runs_as_its_own_read_only_service_account() -> None:
    docs = _everything()
    jobs = [d for d in docs if d["kind"] in ("Job", "CronJob")]
    for job in jobs:
        pod = job["spec"]["template"]["spec"] if job["kind"] == "Job" else \
            job["spec"]["jobTemplate"]["spec"]["template"]["spec"]
        assert pod["serviceAccountName"] == "ratefit-trainer"
    assert _grants(docs, "ratefit-trainer") == {("ratefit.dev", "sizingpolicies", v) for v in ("get", "list", "watch")}
    # and the controller's identity is a different one
    assert ("apps", "deployments", "patch") in _grants(docs, "ratefit-controller")
