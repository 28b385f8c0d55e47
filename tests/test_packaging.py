"""Packaging: the folders `models/` and `controller/` install as `ratefit.models`
and `ratefit.controller` with both `pip install .` and `pip install -e .`, in a
fresh venv. The installs use --no-deps/--no-build-isolation so the test needs no
network; the imports checked need only the standard library."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
import venv
from pathlib import Path

import pytest
import setuptools

ROOT = Path(__file__).resolve().parent.parent


def test_every_subpackage_is_listed_in_pyproject() -> None:
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())
    listed = set(conf["tool"]["setuptools"]["packages"])
    found = set()
    for folder, name in (("models", "ratefit.models"), ("controller", "ratefit.controller")):
        for init in (ROOT / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / folder)
            found.add(".".join([name, *rel.parts]) if rel.parts else name)
    assert found <= listed, f"add to [tool.setuptools] packages: {sorted(found - listed)}"


def _fresh_venv(path: Path) -> Path:
    venv.EnvBuilder(with_pip=True, system_site_packages=False).create(path)
    return path / "bin" / "python"


PROBE = (
    "import importlib.util, sys, ratefit.models.keys as k, ratefit.controller.cli as c\n"
    "assert k.parse_key('a/b/c').container == 'c'\n"
    "for mod in ('ratefit.controller.sandbox', 'ratefit.controller.commands', 'ratefit.models.scenario'):\n"
    "    assert importlib.util.find_spec(mod) is not None, mod\n"
    "print(k.__file__)\n"
)


@pytest.mark.slow
@pytest.mark.parametrize("editable", [False, True], ids=["install", "editable"])
def test_pip_install_in_fresh_venv(tmp_path: Path, editable: bool) -> None:
    py = _fresh_venv(tmp_path / "venv")
    src = tmp_path / "src"
    # install from a copy so build artefacts never land in the work tree
    shutil.copytree(
        ROOT, src,
        ignore=shutil.ignore_patterns(".venv", ".git", "__pycache__", "*.egg-info", "build", ".pytest_cache", ".hypothesis"),
    )
    # The build backend (setuptools>=68, wheel: the `test` extra) comes from the
    # test environment so that no step needs the network; the target is the fresh venv.
    backend = str(Path(setuptools.__file__).parent.parent)
    env = {**os.environ, "PYTHONPATH": backend, "PIP_NO_INDEX": "1"}
    args = [str(py), "-m", "pip", "install", "-q", "--no-deps", "--no-build-isolation"]
    args += ["-e", str(src)] if editable else [str(src)]
    res = subprocess.run(args, capture_output=True, text=True, env=env)
    assert res.returncode == 0, res.stdout + res.stderr
    out = subprocess.run([str(py), "-c", PROBE], capture_output=True, text=True, cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    where = Path(out.stdout.strip())
    if editable:
        assert where == src / "models" / "keys.py"
    else:
        assert "site-packages" in where.parts
    assert (py.parent / "ratefit").exists(), "console script `ratefit` not installed"
