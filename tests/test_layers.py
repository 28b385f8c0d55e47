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


#: pure modules: decisions and the values they are made of — no adapter, no I/O
PURE = (
    "controller/decide.py",
    "controller/limits.py",
    "controller/policy.py",
    "controller/stages/record.py",
    "controller/review.py",
    "models/curve.py",
    "models/select.py",
)
#: ratefit modules that talk to the world (adapters)
ADAPTERS = ("ratefit.controller.kube", "ratefit.controller.sizing_client", "ratefit.controller.metrics_source",
            "ratefit.controller.sandbox")
#: libraries that do I/O (network, processes, servers)
IO_LIBRARIES = ("kubernetes", "httpx", "requests", "urllib", "urllib3", "socket", "subprocess", "prometheus_client",
                "fastapi", "uvicorn")


def _module_file(name: str) -> Path | None:
    """The source file of a ratefit module (``ratefit.controller.x`` → controller/x.py)."""
    parts = name.split(".")
    if parts[0] != "ratefit" or len(parts) < 2:
        return None
    base = ROOT.joinpath(*parts[1:])
    for cand in (base.with_suffix(".py"), base / "__init__.py"):
        if cand.is_file():
            return cand
    return None


def _closure(path: Path) -> dict[str, str]:
    """Every module ``path`` imports, following ratefit's own modules: name → the file that imports it."""
    seen: dict[str, str] = {}
    todo = [path]
    done: set[Path] = set()
    while todo:
        p = todo.pop()
        if p in done:
            continue
        done.add(p)
        tree = ast.parse(p.read_text(encoding="utf-8"), filename=str(p))
        for node in ast.walk(tree):
            if isinstance(node, ast.If) and getattr(node.test, "id", None) == "TYPE_CHECKING":
                node.body = []  # annotations only: never imported at run time
        names = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names.update(a.name for a in node.names)
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names.add(node.module)
                names.update(f"{node.module}.{a.name}" for a in node.names)  # `from pkg import module`
        for n in names:
            seen.setdefault(n, str(p.relative_to(ROOT)))
            f = _module_file(n)
            if f is not None:
                todo.append(f)
    return seen


def _is(name: str, prefixes: tuple[str, ...]) -> bool:
    return any(name == x or name.startswith(x + ".") or (x.endswith(("kube",)) and name.startswith(x))
               for x in prefixes)


@pytest.mark.parametrize("rel", PURE)
def test_pure_modules_import_no_adapter_and_no_io(rel: str) -> None:
    """Pure decision code apart from I/O adapters (the project's rules): directly or
    through any ratefit module it imports, a pure module reaches no adapter
    (controller/kube*, sizing_client, metrics_source, sandbox) and no I/O library."""
    closure = _closure(ROOT / rel)
    bad = sorted(f"{n} (imported by {by})" for n, by in closure.items() if _is(n, ADAPTERS + IO_LIBRARIES))
    assert not bad, f"{rel} reaches {bad}: keep I/O in the adapters and pass values in"


def test_the_purity_check_sees_an_adapter() -> None:
    """The check itself works: the observe stage (which reads the cluster) is caught."""
    closure = _closure(ROOT / "controller/stages/observe.py")
    assert any(_is(n, ADAPTERS) for n in closure)
