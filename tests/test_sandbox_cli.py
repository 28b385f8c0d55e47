"""`ratefit sandbox` as a command: --help says it is a stand-in, --load creates manifests
at start (namespaces as needed), the written kubeconfig works with the real kubectl,
SIGTERM stops it cleanly, and a bad --load path is a user error (exit 2)."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from sandbox_fixtures import WIDGET_CRD

RATEFIT = [sys.executable, "-m", "ratefit.controller.cli"]


def test_help_says_it_is_a_stand_in() -> None:
    out = subprocess.run([*RATEFIT, "sandbox", "--help"], capture_output=True, text=True,
                         check=True).stdout
    out = " ".join(out.split())
    assert "stand-in, not a cluster" in out
    assert "no scheduler and no kubelet" in out
    assert "--load" in out and "--kubeconfig" in out and "/_sandbox/faults" in out


def test_load_serve_and_stop(tmp_path: Path) -> None:
    if shutil.which("kubectl") is None:
        pytest.skip("kubectl is not installed")
    manifests = tmp_path / "m"
    manifests.mkdir()
    (manifests / "crd.yaml").write_text(yaml.safe_dump(WIDGET_CRD))
    (manifests / "objs.yaml").write_text(
        "apiVersion: example.test/v1\nkind: Widget\nmetadata: {name: green, namespace: depot}\n"
        "spec: {size: 2}\n---\n"
        "apiVersion: apps/v1\nkind: Deployment\nmetadata: {name: sorter, namespace: depot}\n"
        "spec:\n  selector: {matchLabels: {app: sorter}}\n  template:\n"
        "    metadata: {labels: {app: sorter}}\n"
        "    spec: {containers: [{name: c, image: 'registry.example/sorter:1'}]}\n")
    kc = tmp_path / "kc"
    proc = subprocess.Popen([*RATEFIT, "sandbox", "--kubeconfig", str(kc), "--load",
                             str(manifests)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    try:
        assert proc.stdout is not None
        url = proc.stdout.readline().strip()
        assert url.startswith("http://127.0.0.1:"), proc.stderr.read() if proc.stderr else ""
        env = {**os.environ, "KUBECONFIG": str(kc)}
        run = lambda *a: subprocess.run(  # noqa: E731
            ["kubectl", "--cache-dir", str(tmp_path / "cache"), *a], env=env,
            capture_output=True, text=True, timeout=30)
        out = run("get", "widgets,deployments,pods", "-n", "depot")
        assert out.returncode == 0, out.stderr
        assert "widget.example.test/green" in out.stdout
        assert "deployment.apps/sorter" in out.stdout and "Running" in out.stdout
        assert run("config", "current-context").stdout.strip() == "ratefit-sandbox"
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            rc = proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            rc = proc.wait(timeout=5)
        err = proc.stderr.read() if proc.stderr else ""
        for s in (proc.stdout, proc.stderr):
            if s:
                s.close()
    assert rc == 0, err
    assert "a stand-in, not a cluster" in err


def test_bad_load_path_is_a_user_error(tmp_path: Path) -> None:
    out = subprocess.run([*RATEFIT, "sandbox", "--kubeconfig", str(tmp_path / "kc"),
                          "--load", str(tmp_path / "missing.yaml")],
                         capture_output=True, text=True, timeout=30)
    assert out.returncode == 2
    assert "ratefit sandbox: error:" in out.stderr and "missing.yaml" in out.stderr
