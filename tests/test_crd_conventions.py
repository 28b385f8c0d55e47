"""The SizingPolicy CRD follows the Kubernetes API conventions the issue names (issue 10).

Source: Kubernetes API conventions (community/contributors/devel/sig-architecture/
api-conventions.md):
- "Primitive types": "Avoid floating-point values as much as possible, and never use
  them in spec." → no ``type: number`` anywhere under ``spec``.
- "Constants": "Some fields will have a list of allowed values (enumerations). These
  values will be strings, and they will be in CamelCase, with an initial uppercase
  letter." → every ``enum`` value (spec and status) matches ``^[A-Z][A-Za-z0-9]*$``.
The walker covers every schema node (properties, items, anyOf/allOf/oneOf,
additionalProperties) and is itself checked on planted faults.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Iterator
from pathlib import Path

import yaml

from ratefit.controller.decide import Verdict, Why
from ratefit.controller.policy import CpuLimit, Mode, ResizeBy

ROOT = Path(__file__).resolve().parents[1]
CRD_PATH = ROOT / "manifests" / "crd" / "sizingpolicy.yaml"
#: Kubernetes API conventions, "Constants": CamelCase with an initial uppercase letter
CAMEL = re.compile(r"^[A-Z][A-Za-z0-9]*$")


def _schema() -> dict:
    crd = yaml.safe_load(CRD_PATH.read_text())
    (version,) = crd["spec"]["versions"]
    return version["schema"]["openAPIV3Schema"]


def walk(node: object, path: str) -> Iterator[tuple[str, dict]]:
    """Every schema node below ``node`` with its dotted path."""
    if not isinstance(node, dict):
        return
    yield path, node
    for key, child in (node.get("properties") or {}).items():
        yield from walk(child, f"{path}.{key}")
    if isinstance(node.get("items"), dict):
        yield from walk(node["items"], f"{path}[]")
    if isinstance(node.get("additionalProperties"), dict):
        yield from walk(node["additionalProperties"], f"{path}.*")
    for combinator in ("anyOf", "allOf", "oneOf"):
        for i, child in enumerate(node.get(combinator) or ()):
            yield from walk(child, f"{path}.{combinator}[{i}]")


def floats_in_spec(schema: dict) -> list[str]:
    return [p for p, n in walk(schema["properties"]["spec"], "spec") if n.get("type") == "number"]


def enums_not_camel(schema: dict) -> list[str]:
    return [f"{p}: {v!r}" for p, n in walk(schema, "openAPIV3Schema") for v in n.get("enum") or ()
            if not (isinstance(v, str) and CAMEL.match(v))]


def test_no_floating_point_type_in_spec():
    assert floats_in_spec(_schema()) == []


def test_every_enum_value_is_camel_case():
    assert enums_not_camel(_schema()) == []


def test_the_walk_reaches_the_nested_enums_and_integers():
    # the walk must see what it judges: the nested stepLimit integers and the status enums
    nodes = dict(walk(_schema(), "openAPIV3Schema"))
    assert nodes["openAPIV3Schema.spec.stepLimit.maxIncreasePercent"]["type"] == "integer"
    assert "enum" in nodes["openAPIV3Schema.status.containers[].verdict"]
    assert "enum" in nodes["openAPIV3Schema.status.containers[].reason"]
    assert "enum" in nodes["openAPIV3Schema.status.conditions[].status"]


def test_the_walk_finds_planted_faults():
    schema = copy.deepcopy(_schema())
    spec = schema["properties"]["spec"]["properties"]
    spec["stepLimit"]["properties"]["maxIncreasePercent"]["type"] = "number"
    spec["containers"]["items"]["properties"]["floor"]["anyOf"].append({"type": "number"})
    spec["mode"]["enum"] = ["dry-run", "Apply"]
    schema["properties"]["status"]["properties"]["containers"]["items"]["properties"]["verdict"]["enum"] = ["held"]
    assert sorted(floats_in_spec(schema)) == ["spec.containers[].floor.anyOf[2]", "spec.stepLimit.maxIncreasePercent"]
    assert sorted(enums_not_camel(schema)) == sorted([
        "openAPIV3Schema.spec.mode: 'dry-run'",
        "openAPIV3Schema.status.containers[].verdict: 'held'",
    ])


def test_the_code_enums_are_camel_case_too():
    # what the controller writes and reads is what the CRD allows
    for enum in (Mode, ResizeBy, CpuLimit, Verdict, Why):
        assert all(CAMEL.match(m.value) for m in enum), enum
