"""README "On your cluster": every command of its block runs, in order, against the local
sandbox API server (with the real kubectl) and the real Prometheus.

How the block is run (README says the same):

* the fenced ``sh`` block after ``<!-- docs-test: on-your-cluster -->`` is read from
  README.md; its first line (``export KUBECONFIG=… PROMETHEUS=… STORE=… PORT=…``) is the
  one the reader edits, and the test replaces it with the sandbox's kubeconfig, the URL of
  a Prometheus holding backfilled history, a temporary store and a free loopback port;
* the ``yaml`` block after ``<!-- docs-test: my-policies/api.yaml -->`` is written to
  ``my-policies/api.yaml``, next to the reader's other policies (here: the StatefulSets
  ``db`` and ``db-1`` and the Deployment ``api-v2``, names that could fool a pattern);
* each other line runs with ``bash -c`` in a folder where ``manifests`` is this
  repository's; it must exit 0. A line ending in ``&`` is started in the background,
  waited for (its ``/readyz``), and stopped by its PID at the end;
* then the inline ``kubectl patch sizingpolicy …`` of the last bullet runs too.

The cluster already runs the workloads (applied by the test, as on a real cluster); the
history is written for the pod names the sandbox gave them (``NAME-<hash>-<5>`` and
``NAME-<ordinal>``, Kubernetes docs), in the ``http_requests_total{namespace,pod}``
convention and the cAdvisor series. Outcomes checked: the models the policies name are in
the store, the checklist has no FAIL, the review has one row per policy container with a
demand from the model (not NoMetrics/NoModel), and the patched policy is in apply mode.
INVENTED data (Kestrel Post naming).
"""

from __future__ import annotations

import json
import os
import re
import shlex
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
import yaml

from cluster_history import write_history

REPO = Path(__file__).resolve().parents[1]
README = REPO / "README.md"
BIN = Path(sys.executable).parent
NS = "shop"

#: the reader's workloads: (kind, name, container, replicas)
WORKLOADS = [("Deployment", "api", "app", 2), ("Deployment", "api-v2", "app", 1),
             ("StatefulSet", "db", "db", 2), ("StatefulSet", "db-1", "db", 2)]
#: base req/s per pod of each workload (cluster_history swings it by ±50 %)
BASE = {"api": 20.0, "api-v2": 40.0, "db": 10.0, "db-1": 50.0}


def fenced_block(marker: str) -> str:
    text = README.read_text(encoding="utf-8")
    m = re.search(re.escape(f"<!-- docs-test: {marker} -->") + r"\s*```\w*\n(.*?)```", text, re.S)
    assert m, f"README.md has no fenced block after <!-- docs-test: {marker} -->"
    return m.group(1)


def workload_docs() -> list[dict]:
    docs: list[dict] = [{"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": NS}}]
    for kind, name, container, replicas in WORKLOADS:
        labels = {"app": name}
        spec = {"replicas": replicas, "selector": {"matchLabels": labels},
                "template": {"metadata": {"labels": labels},
                             "spec": {"containers": [{"name": container, "image": "registry.example/kestrel:1",
                                                      "resources": {"requests": {"cpu": "500m"},
                                                                    "limits": {"cpu": "1"}}}]}}}
        if kind == "StatefulSet":
            spec["serviceName"] = name
        docs.append({"apiVersion": "apps/v1", "kind": kind, "metadata": {"name": name, "namespace": NS},
                     "spec": spec})
    return docs


def other_policies() -> list[dict]:
    return [{"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
             "metadata": {"name": name, "namespace": NS},
             "spec": {"workload": {"kind": kind, "name": name}, "mode": "DryRun",
                      "containers": [{"name": c, "model": f"{NS}/{name}/{c}", "floor": "20m", "ceiling": "2"}]}}
            for kind, name, c, _ in WORKLOADS if name != "api"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _owner(pod: str) -> str:
    names = sorted(BASE, key=len, reverse=True)
    for n in names:  # the test's own ground truth: the sandbox labels pods app=<workload>
        if pod.startswith(n + "-"):
            return n
    raise AssertionError(pod)


@pytest.mark.prometheus
@pytest.mark.slow
def test_every_command_of_on_your_cluster_runs(sandbox, sandbox_kubeconfig, kubectl, tmp_path):
    from prom_fixtures import backfill, run_prometheus

    from ratefit.controller.local_servers import stop_process

    lines = [ln for ln in fenced_block("on-your-cluster").splitlines() if ln.strip()]
    assert lines[0].startswith("export KUBECONFIG=") and "PROMETHEUS=" in lines[0]
    policy = yaml.safe_load(fenced_block("my-policies/api.yaml"))
    assert policy["kind"] == "SizingPolicy" and policy["spec"]["mode"] == "DryRun"

    # the reader's cluster: workloads running, pods named by the sandbox
    kubectl("apply", "-f", "-", input=yaml.safe_dump_all(workload_docs()), check=True)
    pods = json.loads(kubectl("get", "pods", "-n", NS, "-o", "json", check=True).stdout)["items"]
    by_pod = {}
    for p in pods:
        name = p["metadata"]["name"]
        wl = p["metadata"]["labels"]["app"]
        assert _owner(name) == wl
        by_pod[(NS, name)] = (p["spec"]["containers"][0]["name"], BASE[wl] * (1 + 0.1 * len(by_pod)))
    assert len(by_pod) == sum(w[3] for w in WORKLOADS)
    # the reader's Prometheus: 2 h of history up to a little past the end of this test, so
    # instant queries "now" find fresh samples whatever the test's pace
    end = float(int(time.time()) + 1200)
    end -= end % 15
    backfill(write_history(tmp_path / "history.om", by_pod, end=end, seconds=7200 + 1200), tmp_path / "tsdb")

    work = tmp_path / "reader"
    (work / "my-policies").mkdir(parents=True)
    (work / "manifests").symlink_to(REPO / "manifests")
    (work / "my-policies" / "api.yaml").write_text(fenced_block("my-policies/api.yaml"))
    (work / "my-policies" / "others.yaml").write_text(yaml.safe_dump_all(other_policies()))
    port = free_port()
    background: list[subprocess.Popen] = []
    with run_prometheus(tmp_path / "tsdb") as prom:
        env = {**os.environ, "PATH": f"{BIN}{os.pathsep}{os.environ.get('PATH', '')}",
               "KUBECONFIG": str(sandbox_kubeconfig), "PROMETHEUS": prom.url, "STORE": str(work / "models"),
               "PORT": str(port)}
        try:
            for line in lines[1:]:
                cmd = line.split(" #")[0].strip() if not line.lstrip().startswith("#") else ""
                if not cmd:
                    continue
                if cmd.endswith("&"):
                    proc = subprocess.Popen(["bash", "-c", "exec " + cmd[:-1].strip()], cwd=work, env=env,
                                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                                            start_new_session=True)
                    background.append(proc)
                    _wait_ready(f"http://127.0.0.1:{port}/readyz", proc)
                    continue
                done = subprocess.run(["bash", "-c", cmd], cwd=work, env=env, capture_output=True, text=True,
                                      timeout=900)
                assert done.returncode == 0, f"{cmd}\n-> exit {done.returncode}\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
                if cmd.startswith("ratefit check"):
                    assert "FAIL" not in done.stdout, done.stdout
            # the bullet's switch to apply
            text = README.read_text(encoding="utf-8")
            (patch,) = re.findall(r"`(kubectl patch sizingpolicy [^`]+)`", text)
            done = subprocess.run(shlex.split(patch), cwd=work, env=env, capture_output=True, text=True, timeout=60)
            assert done.returncode == 0, done.stderr
        finally:
            for proc in background:
                stop_process(proc)
                if proc.stderr:
                    proc.stderr.close()

    from ratefit.models.store import ModelStore

    named = {f"{NS}/{name}/{c}" for _, name, c, _ in WORKLOADS}
    assert set(ModelStore(work / "models").keys()) == named
    review = (work / "review.md").read_text()
    for _, name, c, _ in WORKLOADS:
        row = next((r for r in review.splitlines() if f"/{name} " in r.replace("|", " ") + " " and f" {c} " in r),
                   None)
        assert row is not None, f"no review row for {name}/{c}:\n{review}"
        assert "NoMetrics" not in row and "NoModel" not in row, row
    got = json.loads(kubectl("get", "sizingpolicy", "api", "-n", NS, "-o", "json", check=True).stdout)
    assert got["spec"]["mode"] == "Apply"
    # step 10 created the trainer's CronJob and Indexed Job in the sandbox
    listed = kubectl("get", "cronjobs,jobs", "-n", "ratefit-system", check=True).stdout
    assert "ratefit-train-daily" in listed and "job.batch/ratefit-train" in listed


def _wait_ready(url: str, proc: subprocess.Popen, timeout: float = 120) -> None:
    deadline = time.monotonic() + timeout
    while True:
        if proc.poll() is not None:
            raise AssertionError(f"the background command exited {proc.returncode}: "
                                 f"{proc.stderr.read() if proc.stderr else ''}")
        try:
            with urllib.request.urlopen(url, timeout=2) as resp:
                if resp.status == 200:
                    return
        except OSError:
            pass
        if time.monotonic() > deadline:
            raise AssertionError(f"{url} did not answer within {timeout:g}s")
        time.sleep(0.2)
