"""Layer checks (in the spirit of an import-linter contract, kept as a test so it
runs everywhere): ``ratefit.models`` never imports ``ratefit.controller``, and
only the Kubernetes adapter, the sandbox and the CLI command that starts the
sandbox import the ``kubernetes`` client."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

#: modules of controller/ allowed to import the kubernetes client (paths relative to ROOT)
KUBERNETES_ALLOWED = ("controller/kube", "controller/sandbox", "controller/commands/sandbox.py")


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def _sources(folder: str) -> list[Path]:
    return sorted((ROOT / folder).rglob("*.py"))


@pytest.mark.parametrize("path", _sources("models"), ids=lambda p: str(p.relative_to(ROOT)))
def test_models_never_import_controller(path: Path) -> None:
    bad = {n for n in _imports(path) if n == "ratefit.controller" or n.startswith("ratefit.controller.")}
    assert not bad, f"{path.relative_to(ROOT)} imports {sorted(bad)}: models must not depend on controller"


@pytest.mark.parametrize("path", _sources("models"), ids=lambda p: str(p.relative_to(ROOT)))
def test_models_do_not_use_kubernetes(path: Path) -> None:
    bad = {n for n in _imports(path) if n == "kubernetes" or n.startswith("kubernetes.")}
    assert not bad, f"{path.relative_to(ROOT)} imports the kubernetes client; keep it in controller/kube*"


@pytest.mark.parametrize("path", _sources("controller"), ids=lambda p: str(p.relative_to(ROOT)))
def test_kubernetes_client_only_in_adapter_and_sandbox(path: Path) -> None:
    rel = str(path.relative_to(ROOT))
    if rel.startswith(KUBERNETES_ALLOWED):
        return
    bad = {n for n in _imports(path) if n == "kubernetes" or n.startswith("kubernetes.")}
    assert not bad, f"{rel} imports {sorted(bad)}: only controller/kube*.py and controller/sandbox/ may"


def test_no_bare_top_level_imports() -> None:
    """Import names are ratefit.models / ratefit.controller, never bare `models`/`controller`."""
    offenders = []
    for path in _sources("models") + _sources("controller") + _sources("tests"):
        for name in _imports(path):
            if name.split(".")[0] in {"models", "controller"}:
                offenders.append(f"{path.relative_to(ROOT)}: {name}")
    assert not offenders, offenders
