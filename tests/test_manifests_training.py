"""manifests/training: the daily CronJob and the Indexed Job that run
`ratefit train --from-policies`, rendered with the real `kubectl kustomize`, validated
against the published Kubernetes OpenAPI schemas (`kubernetes-validate`, strict), and
their container args parsed by ratefit's own CLI parser.

Kubernetes facts relied on (Kubernetes docs): a CronJob's `concurrencyPolicy: Forbid`
skips a run while the previous one is still running ("CronJob: Concurrency policy"); the
schedule is the five cron fields minute, hour, day of month, month, day of week; in an
Indexed Job each pod gets JOB_COMPLETION_INDEX in 0..completions-1 ("Jobs: Completion
mode"); `$(VAR)` in args expands from the container's environment, envFrom included
("Define dependent environment variables"); a ClusterRoleBinding grants its ClusterRole's
rules to its subjects (API reference, RBAC).
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import kubernetes_validate
import pytest
import yaml

ROOT = Path(__file__).resolve().parent.parent
MANIFESTS = ROOT / "manifests"
K8S_VERSION = "1.33.0"

pytestmark = pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")


def _render(path: Path) -> list[dict]:
    out = subprocess.run(["kubectl", "kustomize", str(path)], capture_output=True, text=True, check=True).stdout
    return [d for d in yaml.safe_load_all(out) if d]


def _pod(doc: dict) -> dict:
    return (doc["spec"]["jobTemplate"]["spec"] if doc["kind"] == "CronJob" else doc["spec"])["template"]["spec"]


@pytest.fixture(scope="module")
def training() -> dict[str, dict]:
    docs = _render(MANIFESTS / "training")
    return {d["kind"]: d for d in docs}


@pytest.fixture(scope="module")
def base() -> list[dict]:
    return _render(MANIFESTS / "overlays" / "dry-run")


def test_renders_a_cronjob_and_an_indexed_job_that_validate(training):
    assert set(training) == {"CronJob", "Job"}
    for doc in training.values():
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)
        assert doc["metadata"]["namespace"] == "ratefit-system"
        job_spec = doc["spec"]["jobTemplate"]["spec"] if doc["kind"] == "CronJob" else doc["spec"]
        for labels in (doc["metadata"]["labels"], job_spec["template"]["metadata"]["labels"]):
            assert labels == {"app.kubernetes.io/name": "ratefit", "app.kubernetes.io/component": "trainer"}
    cron = training["CronJob"]["spec"]
    assert cron["concurrencyPolicy"] == "Forbid"
    minute, hour, dom, month, dow = cron["schedule"].split()
    assert minute.isdigit() and hour.isdigit() and (dom, month, dow) == ("*", "*", "*"), "once a day"
    job = training["Job"]["spec"]
    assert job["completionMode"] == "Indexed"


def test_args_parse_with_ratefit_and_shard_by_the_completion_index(training, base):
    from ratefit.controller.cli import build_parser

    cm = next(d for d in base if d["kind"] == "ConfigMap" and d["metadata"]["name"] == "ratefit-controller")
    parser = build_parser()
    for kind, doc in training.items():
        (c,) = _pod(doc)["containers"]
        env = {e["name"]: e.get("value", "") for e in c.get("env") or []}
        for src in c.get("envFrom") or []:
            assert src["configMapRef"]["name"] == cm["metadata"]["name"]
            env |= cm["data"]
        args = []
        for a in c["args"]:
            for var in re.findall(r"\$\((\w+)\)", a):
                assert var in env, f"{kind}: $({var}) is not defined in the container's environment"
            args.append(re.sub(r"\$\((\w+)\)", lambda m: env[m.group(1)], a))
        ns = parser.parse_args(args)
        assert ns.command == "train" and ns.from_policies is True
        assert ns.prometheus.startswith("http") and ns.store == "/var/lib/ratefit/models"
        mount = {m["mountPath"] for m in c["volumeMounts"]}
        assert ns.store in mount
        if kind == "Job":
            # every index 0..completions-1 is a shard: auto/N with N = completions
            assert ns.shard == f"auto/{doc['spec']['completions']}"
        else:
            assert ns.shard is None  # the daily run takes every model


def test_both_run_as_the_read_only_trainer(training, base):
    docs = base + list(training.values())
    for doc in training.values():
        pod = _pod(doc)
        assert pod["serviceAccountName"] == "ratefit-trainer"
        assert pod["securityContext"]["runAsNonRoot"] is True
        (c,) = pod["containers"]
        assert c["securityContext"]["allowPrivilegeEscalation"] is False
        assert c["securityContext"]["readOnlyRootFilesystem"] is True
    sa = [d for d in docs if d["kind"] == "ServiceAccount" and d["metadata"]["name"] == "ratefit-trainer"]
    assert len(sa) == 1 and sa[0]["metadata"]["namespace"] == "ratefit-system"
    roles = {(d["kind"], d["metadata"]["name"]): d for d in docs if d["kind"] in ("ClusterRole", "Role")}
    grants = set()
    for b in (d for d in docs if d["kind"] in ("ClusterRoleBinding", "RoleBinding")):
        if any(s["kind"] == "ServiceAccount" and s["name"] == "ratefit-trainer" for s in b["subjects"]):
            role = roles[(b["roleRef"]["kind"], b["roleRef"]["name"])]
            grants |= {(g, r, v) for rule in role["rules"] for g in rule["apiGroups"] for r in rule["resources"]
                       for v in rule["verbs"]}
    # read SizingPolicies; nothing else in the cluster
    assert grants == {("ratefit.dev", "sizingpolicies", v) for v in ("get", "list", "watch")}
