"""The profiling Job (manifests/profiling/): rendered with the real `kubectl kustomize`,
validated against the published Kubernetes OpenAPI schemas (`kubernetes-validate`),
and its arguments parsed by ratefit's own CLI so a renamed flag cannot break it."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import kubernetes_validate
import pytest
import yaml

ROOT = Path(__file__).resolve().parent.parent
PROFILING = ROOT / "manifests" / "profiling"
K8S_VERSION = "1.33.0"  # as tests/test_manifests_deploy.py


def job_docs() -> list[dict]:
    return [d for d in yaml.safe_load_all((PROFILING / "job.yaml").read_text()) if d]


def test_job_validates_against_the_kubernetes_schemas() -> None:
    docs = job_docs()
    assert [d["kind"] for d in docs] == ["Job"]
    for doc in docs:
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)


@pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")
def test_kustomize_renders_the_job() -> None:
    out = subprocess.run(["kubectl", "kustomize", str(PROFILING)], capture_output=True, text=True, check=True).stdout
    docs = [d for d in yaml.safe_load_all(out) if d]
    assert [d["kind"] for d in docs] == ["Job"]
    kubernetes_validate.validate(docs[0], K8S_VERSION, strict=True)


def test_labels_namespace_and_restricted_pod_security() -> None:
    job = job_docs()[0]
    want = {"app.kubernetes.io/name": "ratefit", "app.kubernetes.io/component": "profiler"}
    assert want.items() <= job["metadata"]["labels"].items()
    assert want.items() <= job["spec"]["template"]["metadata"]["labels"].items()
    assert job["metadata"]["namespace"] == "staging"
    spec = job["spec"]["template"]["spec"]
    # Pod Security Standards, "restricted" profile (Kubernetes docs)
    assert spec["securityContext"]["runAsNonRoot"] is True
    assert spec["securityContext"]["seccompProfile"]["type"] == "RuntimeDefault"
    assert spec["automountServiceAccountToken"] is False
    for c in spec["containers"]:
        assert c["securityContext"]["allowPrivilegeEscalation"] is False
        assert c["securityContext"]["capabilities"]["drop"] == ["ALL"]
        assert "requests" in c["resources"]
    assert spec["restartPolicy"] == "Never"


def test_args_parse_with_the_cli_and_read_cpu_from_prometheus() -> None:
    """$(VAR) expanded from the container's env as the kubelet does (Kubernetes docs,
    "Define dependent environment variables"), then parsed by `ratefit`'s parser."""
    from ratefit.controller.cli import build_parser
    from ratefit.controller.profile.cpu_probe import parse_cpu_from
    from ratefit.controller.profile.loadgen import parse_target
    from ratefit.models.durations import parse_duration

    c = job_docs()[0]["spec"]["template"]["spec"]["containers"][0]
    env = {e["name"]: e["value"] for e in c["env"]}
    args = [re.sub(r"\$\((\w+)\)", lambda m: env[m.group(1)], a) for a in c["args"]]
    ns = build_parser().parse_args(args)
    assert ns.command == "profile"
    assert ns.cpu_from.startswith("prometheus:") and ns.prometheus.startswith("http://")
    assert parse_target(ns.url).host.endswith(".staging.svc")
    assert ns.output == "json" and ns.out and ns.slo_p99 > 0
    # the rate() range in the CPU query is no longer than the warm-up (see cpu_probe)
    rng = re.search(r"\[(\w+)\]", ns.cpu_from).group(1)
    assert parse_duration(rng) <= parse_duration(ns.warmup)
    probe = parse_cpu_from(ns.cpu_from, prometheus_url=ns.prometheus)
    probe.client.close()
    assert probe.query.startswith("sum(rate(container_cpu_usage_seconds_total{")
    # the steps fit in the Job's deadline
    job = job_docs()[0]
    assert ns.steps * parse_duration(ns.step_duration) < job["spec"]["activeDeadlineSeconds"]
