"""Deploy manifests: rendered with the real `kubectl kustomize`, every object
validated against the published Kubernetes OpenAPI schemas (`kubernetes-validate`,
a reference library), and checked for the facts we depend on."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import kubernetes_validate
import pytest
import yaml

ROOT = Path(__file__).resolve().parent.parent
MANIFESTS = ROOT / "manifests"
OVERLAYS = ("dry-run", "apply")
#: Kubernetes version the schemas are taken from (in-place resize is beta in 1.33)
K8S_VERSION = "1.33.0"

needs_kubectl = pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")


def render(overlay: str) -> list[dict]:
    out = subprocess.run(
        ["kubectl", "kustomize", str(MANIFESTS / "overlays" / overlay)],
        capture_output=True, text=True, check=True,
    ).stdout
    return [d for d in yaml.safe_load_all(out) if d]


def by_kind(docs: list[dict], kind: str) -> list[dict]:
    return [d for d in docs if d["kind"] == kind]


@needs_kubectl
@pytest.mark.parametrize("overlay", OVERLAYS)
def test_overlay_renders_and_validates(overlay: str) -> None:
    docs = render(overlay)
    kinds = {d["kind"] for d in docs}
    assert {"CustomResourceDefinition", "Deployment", "ClusterRole", "ServiceAccount", "Service"} <= kinds
    for doc in docs:
        # kubernetes-validate: the published OpenAPI schemas of Kubernetes, strict (no unknown fields)
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)


@pytest.mark.parametrize("path", sorted((MANIFESTS / "training").glob("*.yaml")), ids=lambda p: p.name)
def test_training_job_validates(path: Path) -> None:
    for doc in yaml.safe_load_all(path.read_text()):
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)
        if doc["kind"] == "Job":
            # Indexed completion mode gives each pod JOB_COMPLETION_INDEX (Kubernetes docs, "Jobs")
            assert doc["spec"]["completionMode"] == "Indexed"


@needs_kubectl
def test_dry_run_overlay_forces_dry_run_and_apply_keeps_budget_low() -> None:
    dry = by_kind(render("dry-run"), "ConfigMap")[0]["data"]
    app = by_kind(render("apply"), "ConfigMap")[0]["data"]
    assert dry["RATEFIT_DRY_RUN"] == "true"
    assert app["RATEFIT_DRY_RUN"] == "false"
    # small budgets while trust is earned (common practice, no source)
    assert int(app["RATEFIT_BUDGET_PER_MINUTE"]) <= 5 and int(app["RATEFIT_MAX_ROLLOUTS"]) <= 2


@needs_kubectl
def test_rbac_grants_what_the_adapter_uses_and_no_more() -> None:
    docs = render("dry-run")
    rules = by_kind(docs, "ClusterRole")[0]["rules"]
    granted = {(g, r, v) for rule in rules for g in rule["apiGroups"] for r in rule["resources"] for v in rule["verbs"]}
    needed = {
        ("ratefit.dev", "sizingpolicies", "list"), ("ratefit.dev", "sizingpolicies", "watch"),
        ("ratefit.dev", "sizingpolicies/status", "patch"),
        ("apps", "deployments", "patch"), ("apps", "statefulsets", "patch"),
        ("", "pods", "list"), ("", "pods/resize", "patch"),
        ("autoscaling", "horizontalpodautoscalers", "list"),
        ("events.k8s.io", "events", "create"),
    }
    assert needed <= granted
    # never more than the controller needs: no wildcards, no secrets, no delete
    assert not any("*" in t for t in granted)
    assert not any(r == "secrets" for _, r, _ in granted)
    assert not any(v in {"delete", "deletecollection", "escalate", "bind"} for _, _, v in granted)
    lease_rules = [r for role in by_kind(docs, "Role") for r in role["rules"]]
    assert any("leases" in r["resources"] and "update" in r["verbs"] for r in lease_rules)


@needs_kubectl
def test_pods_meet_restricted_pod_security() -> None:
    # Pod Security Standards, "restricted" profile (Kubernetes docs): non-root,
    # no privilege escalation, all capabilities dropped, RuntimeDefault seccomp.
    dep = by_kind(render("dry-run"), "Deployment")[0]
    spec = dep["spec"]["template"]["spec"]
    assert spec["securityContext"]["runAsNonRoot"] is True
    assert spec["securityContext"]["seccompProfile"]["type"] == "RuntimeDefault"
    for c in spec["containers"]:
        sc = c["securityContext"]
        assert sc["allowPrivilegeEscalation"] is False
        assert sc["capabilities"]["drop"] == ["ALL"]
        assert "requests" in c["resources"], f"{c['name']}: ratefit's own pods set requests"
    api = next(c for c in spec["containers"] if c["name"] == "sizing-api")
    assert "--host=127.0.0.1" in api["args"], "the sizing API stays on the pod's loopback"


@needs_kubectl
def test_container_args_are_accepted_by_the_cli() -> None:
    """The Deployment's args parse with ratefit's own CLI ($(VAR) expanded as the
    kubelet does from the ConfigMap — Kubernetes docs, "Define dependent environment
    variables"), so a renamed flag cannot break the deployment unnoticed."""
    import re

    from ratefit.controller.cli import build_parser

    docs = render("dry-run")
    data = by_kind(docs, "ConfigMap")[0]["data"]
    env = {**data, "POD_NAME": "ratefit-controller-0"}
    spec = by_kind(docs, "Deployment")[0]["spec"]["template"]["spec"]
    parser = build_parser()
    for c in spec["containers"]:
        args = [re.sub(r"\$\((\w+)\)", lambda m: env[m.group(1)], a) for a in c["args"]]
        ns = parser.parse_args(args)
        assert ns.command == args[0]


def test_service_ports_name_container_ports_and_the_api_metrics_are_scrapeable() -> None:
    """A Service's named targetPort must be the name of a containerPort of the selected
    pods (Kubernetes docs, "Service": "targetPort ... can be a string: the name of a port
    in the Pod"). Both /metrics are reachable from another pod (0.0.0.0), while the sizing
    API itself stays on the pod's loopback."""
    docs = render("dry-run")
    spec = by_kind(docs, "Deployment")[0]["spec"]["template"]["spec"]
    named = {p["name"]: p["containerPort"] for c in spec["containers"] for p in c.get("ports", [])}
    svc = by_kind(docs, "Service")[0]
    targets = {p["targetPort"] for p in svc["spec"]["ports"]}
    assert targets == {"metrics", "api-metrics"} and targets <= set(named)
    api = next(c for c in spec["containers"] if c["name"] == "sizing-api")
    assert {"--metrics-host=0.0.0.0", f"--metrics-port={named['api-metrics']}", "--host=127.0.0.1"} <= set(api["args"])
