"""Reading YAML/JSON manifests (files or directories, multi-document, `kind: List`)
for `ratefit sandbox --load`. CRDs and Namespaces are ordered first so that the
objects that depend on them load in one pass."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from ratefit.models.errors import InputError

_SUFFIXES = (".yaml", ".yml", ".json")
_FIRST = {"CustomResourceDefinition": 0, "Namespace": 1}


def read_manifests(paths: list[str | Path] | tuple[str | Path, ...]) -> list[tuple[str, dict]]:
    """(source, object) pairs from files and directories (recursively, sorted)."""
    docs: list[tuple[str, dict]] = []
    for p in paths:
        path = Path(p)
        if path.is_dir():
            files = sorted(f for f in path.rglob("*") if f.suffix in _SUFFIXES and f.is_file())
        elif path.is_file():
            files = [path]
        else:
            raise InputError(f"{path}: no such file or directory (give manifests to --load)")
        for f in files:
            if f.name == "kustomization.yaml":
                continue
            try:
                loaded = list(yaml.safe_load_all(f.read_text()))
            except yaml.YAMLError as exc:
                raise InputError(f"{f}: not valid YAML: {exc}") from exc
            for i, doc in enumerate(loaded):
                if doc is None:
                    continue
                if not isinstance(doc, dict) or "kind" not in doc or "apiVersion" not in doc:
                    raise InputError(f"{f}: document {i + 1} is not a Kubernetes object "
                                     "(needs apiVersion and kind)")
                items: list[Any] = doc.get("items", []) if doc["kind"].endswith("List") \
                    and "items" in doc else [doc]
                docs += [(f"{f}#{i + 1}", item) for item in items]
    docs.sort(key=lambda d: _FIRST.get(d[1].get("kind", ""), 2))
    return docs
