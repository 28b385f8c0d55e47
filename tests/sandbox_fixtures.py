"""pytest fixtures for the local sandbox API server (registered in tests/conftest.py).

- `sandbox`: a started in-process `SandboxServer` (stopped after the test, also on failure).
- `sandbox_kubeconfig` (alias `kubeconfig`): a kubeconfig file for it.
- `sandbox_api`: a `kubernetes.client.ApiClient` for it.
- `kubectl`: run the real kubectl against it: `kubectl("get", "pods", "-o", "json")` →
  CompletedProcess (text); skips when kubectl is not installed (env RATEFIT_KUBECTL picks
  the binary).
- `sandbox_process`: `ratefit sandbox` in a subprocess → (url, kubeconfig path); killed after.
- `test_crd`: a throwaway CRD (group example.test, kind Widget) as a dict.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from ratefit.controller.local_servers import stop_process
from ratefit.controller.sandbox.server import SandboxServer

#: the kubectl to run (RATEFIT_KUBECTL picks another binary, e.g. a given minor version)
KUBECTL = os.environ.get("RATEFIT_KUBECTL") or shutil.which("kubectl")


@pytest.fixture
def sandbox() -> Iterator[SandboxServer]:
    sb = SandboxServer(bookmark_interval=0.2).start()
    try:
        yield sb
    finally:
        sb.stop()


@pytest.fixture
def sandbox_kubeconfig(sandbox: SandboxServer, tmp_path: Path) -> Path:
    return sandbox.write_kubeconfig(tmp_path / "sandbox.kubeconfig")


@pytest.fixture
def kubeconfig(sandbox_kubeconfig: Path) -> Path:
    return sandbox_kubeconfig


@pytest.fixture
def sandbox_api(sandbox: SandboxServer) -> Iterator[Any]:
    client = sandbox.api_client()
    try:
        yield client
    finally:
        client.close()


@pytest.fixture
def kubectl(sandbox_kubeconfig: Path, tmp_path: Path) -> Callable[..., subprocess.CompletedProcess]:
    if KUBECTL is None:
        pytest.skip("kubectl is not installed (Debian package kubernetes-client)")
    cache = tmp_path / "kubectl-cache"
    env = {**os.environ, "KUBECONFIG": str(sandbox_kubeconfig)}

    def run(*args: str, input: str | None = None, check: bool = False,  # noqa: A002
            timeout: float = 30) -> subprocess.CompletedProcess:
        proc = subprocess.run([KUBECTL, "--cache-dir", str(cache), *args], env=env,
                              input=input, capture_output=True, text=True, timeout=timeout)
        if check and proc.returncode != 0:
            raise AssertionError(f"kubectl {' '.join(args)} failed ({proc.returncode}):\n"
                                 f"{proc.stdout}\n{proc.stderr}")
        return proc

    return run


@pytest.fixture
def sandbox_process(tmp_path: Path) -> Iterator[tuple[str, Path]]:
    """`ratefit sandbox` as a separate process: yields (url, kubeconfig)."""
    kc = tmp_path / "proc.kubeconfig"
    proc = subprocess.Popen(
        [sys.executable, "-m", "ratefit.controller.cli", "sandbox", "--kubeconfig", str(kc),
         "--bookmark-interval", "0.5"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        assert proc.stdout is not None
        url = proc.stdout.readline().strip()
        if not url.startswith("http://127.0.0.1:"):
            raise AssertionError(f"ratefit sandbox did not start: {url!r} "
                                 f"{proc.stderr.read() if proc.stderr else ''}")
        deadline = time.monotonic() + 10
        while True:
            try:
                urllib.request.urlopen(url + "/healthz", timeout=1).read()
                break
            except OSError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.05)
        yield url, kc
    finally:
        stop_process(proc, grace=5)
        for stream in (proc.stdout, proc.stderr):
            if stream:
                stream.close()


WIDGET_CRD: dict[str, Any] = {
    "apiVersion": "apiextensions.k8s.io/v1",
    "kind": "CustomResourceDefinition",
    "metadata": {"name": "widgets.example.test"},
    "spec": {
        "group": "example.test",
        "scope": "Namespaced",
        "names": {"plural": "widgets", "singular": "widget", "kind": "Widget",
                  "shortNames": ["wd"]},
        "versions": [{
            "name": "v1",
            "served": True,
            "storage": True,
            "subresources": {"status": {}},
            "additionalPrinterColumns": [{"name": "Size", "type": "integer",
                                          "jsonPath": ".spec.size"}],
            "schema": {"openAPIV3Schema": {
                "type": "object",
                "properties": {
                    "spec": {
                        "type": "object",
                        "required": ["size"],
                        "properties": {
                            "size": {"type": "integer", "minimum": 1, "maximum": 10},
                            "mode": {"type": "string", "enum": ["dry-run", "apply"],
                                     "default": "dry-run"},
                            "tag": {"type": "string", "pattern": "^[a-z]+$"},
                            "ratio": {"type": "number"},
                            "items": {"type": "array", "maxItems": 2,
                                      "items": {"type": "string"}},
                        },
                    },
                    "status": {
                        "type": "object",
                        "properties": {
                            "phase": {"type": "string"},
                            "observedGeneration": {"type": "integer"},
                        },
                    },
                },
            }},
        }],
    },
}


@pytest.fixture
def test_crd() -> dict[str, Any]:
    import copy

    return copy.deepcopy(WIDGET_CRD)
