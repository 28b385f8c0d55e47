"""The SizingPolicy CRD and the example policies.

- The CRD is validated against the published Kubernetes OpenAPI schema of
  apiextensions.k8s.io/v1 CustomResourceDefinition (kubernetes-validate, strict: no
  unknown fields), for the oldest and newest versions we support.
- Structural-schema rules (Kubernetes docs, "Extend the Kubernetes API with
  CustomResourceDefinitions" → "Specifying a structural schema"): every node has a
  type, except ``x-kubernetes-int-or-string`` nodes whose anyOf is [integer, string];
  list-type map keys are required.
- The CRD's openAPIV3Schema (OpenAPI v3.0 = JSON Schema draft 4 for the keywords we
  use: boolean ``exclusiveMinimum``) accepts every example and rejects bad policies
  (jsonschema's Draft4Validator, the reference implementation of that draft).
- The CRD's defaults and enums are the ones ``ratefit.controller.policy`` and
  ``ratefit.controller.decide`` use; the examples' names exist in the invented demo
  scenario (``models/scenario``).
"""

from __future__ import annotations

import copy
import shutil
import subprocess
from pathlib import Path

import jsonschema
import kubernetes_validate
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from ratefit.controller.decide import Verdict, Why
from ratefit.controller.policy import PolicyInvalid, SizingPolicySpec, parse_policy
from ratefit.models.scenario.services import service

ROOT = Path(__file__).resolve().parents[1]
CRD_PATH = ROOT / "manifests" / "crd" / "sizingpolicy.yaml"
EXAMPLES = sorted((ROOT / "manifests" / "examples").glob("*.yaml"))
POLICY_EXAMPLES = [p for p in EXAMPLES if p.name != "kustomization.yaml"]


@pytest.fixture(scope="module")
def crd() -> dict:
    return yaml.safe_load(CRD_PATH.read_text())


@pytest.fixture(scope="module")
def schema(crd) -> dict:
    (version,) = crd["spec"]["versions"]
    return version["schema"]["openAPIV3Schema"]


@pytest.fixture(scope="module")
def validator(schema) -> jsonschema.Draft4Validator:
    jsonschema.Draft4Validator.check_schema(schema)
    return jsonschema.Draft4Validator(schema)


def _example(name: str) -> dict:
    return yaml.safe_load((ROOT / "manifests" / "examples" / name).read_text())


# ---------------------------------------------------------------- the CRD itself


@pytest.mark.parametrize("k8s_version", ["1.30", "1.33", "1.35"])
def test_crd_validates_against_published_schema(crd, k8s_version):
    # Source: the Kubernetes OpenAPI schemas shipped by kubernetes-validate (strict mode
    # refuses fields the API does not define).
    assert kubernetes_validate.validate(crd, k8s_version, strict=True) == k8s_version


def test_published_schema_catches_a_misspelt_crd_field(crd):
    bad = copy.deepcopy(crd)
    bad["spec"]["versions"][0]["subresource"] = {"status": {}}  # the real field is `subresources`
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(bad, "1.33", strict=True)


def test_crd_names_and_shape(crd):
    spec = crd["spec"]
    assert crd["metadata"]["name"] == f"{spec['names']['plural']}.{spec['group']}"  # K8s rule: <plural>.<group>
    assert spec["group"] == "ratefit.dev"
    assert spec["scope"] == "Namespaced"
    assert spec["names"]["kind"] == "SizingPolicy"
    assert spec["names"]["plural"] == "sizingpolicies"
    (version,) = spec["versions"]
    assert version["name"] == "v1alpha1" and version["served"] and version["storage"]
    assert version["subresources"] == {"status": {}}


def _walk(node: dict, path: str):
    yield path, node
    for key, child in (node.get("properties") or {}).items():
        yield from _walk(child, f"{path}.{key}")
    if isinstance(node.get("items"), dict):
        yield from _walk(node["items"], f"{path}[]")


def test_schema_is_structural(schema):
    # Kubernetes docs, "Specifying a structural schema": a non-empty type everywhere
    # (int-or-string: anyOf [integer, string] instead); the `metadata` node may only
    # restrict name/generateName (we leave it open).
    for path, node in _walk(schema, "openAPIV3Schema"):
        if node.get("x-kubernetes-int-or-string"):
            assert "type" not in node, path
            assert node["anyOf"] == [{"type": "integer"}, {"type": "string"}], path
        else:
            assert node.get("type") in {"object", "array", "string", "integer", "number", "boolean"}, path
        if node.get("x-kubernetes-list-type") == "map":
            # Kubernetes docs: list-map keys must be required or defaulted
            assert set(node["x-kubernetes-list-map-keys"]) <= set(node["items"].get("required", [])), path
        if "default" in node and node.get("type") == "string" and "pattern" in node:
            assert jsonschema.Draft4Validator({"pattern": node["pattern"]}).is_valid(node["default"]), path


def test_printer_columns_point_at_schema_fields(crd, schema):
    cols = {c["name"]: c for c in crd["spec"]["versions"][0]["additionalPrinterColumns"]}
    assert {"Workload", "Mode", "Ready", "Summary", "Last change", "Age"} <= set(cols)
    # the Mode column says what the controller does (issue 10), not what the spec asks
    assert cols["Mode"]["jsonPath"] == ".status.effectiveMode"
    assert cols["Age"]["jsonPath"] == ".metadata.creationTimestamp" and cols["Age"]["type"] == "date"
    assert cols["Last change"]["type"] == "date"
    assert cols["Ready"]["jsonPath"] == '.status.conditions[?(@.type=="Ready")].status'
    for name in ("Workload", "Mode", "Summary", "Last change"):
        node = schema
        for part in cols[name]["jsonPath"].strip(".").split("."):
            node = node["properties"][part]
        assert node["type"] == "string"


def test_enums_match_the_decision_code(schema):
    item = schema["properties"]["status"]["properties"]["containers"]["items"]["properties"]
    assert set(item["reason"]["enum"]) == {w.value for w in Why}
    assert set(item["verdict"]["enum"]) == {v.value for v in Verdict}
    from ratefit.controller.policy import Mode

    assert set(schema["properties"]["status"]["properties"]["effectiveMode"]["enum"]) == {m.value for m in Mode}


def test_defaults_match_the_pydantic_model(schema):
    props = schema["properties"]["spec"]["properties"]
    fields = SizingPolicySpec.model_fields
    by_alias = {(f.alias or n): f for n, f in fields.items()}
    assert set(props) == set(by_alias), "CRD spec fields and SizingPolicySpec fields differ"
    for name, node in props.items():
        if "default" not in node or node.get("type") == "object":
            continue
        model_default = by_alias[name].default
        assert node["default"] == (model_default.value if hasattr(model_default, "value") else model_default), name
    step = props["stepLimit"]["properties"]
    assert step["maxIncreasePercent"]["default"] == by_alias["stepLimit"].default.max_increase_percent
    assert step["maxDecreasePercent"]["default"] == by_alias["stepLimit"].default.max_decrease_percent
    container = props["containers"]["items"]["properties"]
    assert container["floor"]["default"] == "10m"
    from ratefit.controller.policy import ContainerSpec

    assert ContainerSpec.model_fields["floor"].default == "10m"


# ---------------------------------------------------------------- examples


def test_there_are_examples():
    assert len(POLICY_EXAMPLES) >= 5


@pytest.mark.parametrize("path", POLICY_EXAMPLES, ids=lambda p: p.name)
def test_example_accepted_by_crd_schema_and_parser(path, validator):
    obj = yaml.safe_load(path.read_text())
    assert "INVENTED" in path.read_text()  # demo data is marked as invented (RULES.md)
    errors = sorted(validator.iter_errors(obj), key=lambda e: list(e.path))
    assert not errors, [f"{list(e.path)}: {e.message}" for e in errors]
    policy = parse_policy(obj)
    # names exist in the invented Kestrel Post scenario
    svc = service(f"{policy.namespace}/{policy.workload_name}")
    assert svc.kind == policy.workload_kind
    names = {c.name for c in svc.containers}
    for c in policy.containers:
        assert c.name in names
        assert c.model == f"{svc.namespace}/{svc.workload}/{c.name}"


def test_examples_cover_the_features():
    policies = [parse_policy(yaml.safe_load(p.read_text())) for p in POLICY_EXAMPLES]
    assert {p.mode.value for p in policies} == {"DryRun", "Apply"}
    assert {p.resize_by.value for p in policies} == {"Rollout", "InPlace"}
    assert {"StatefulSet", "Deployment"} == {p.workload_kind for p in policies}
    # the scenario's HPA-on-CPU workload has a policy that must be held
    hpa = [p for p in policies if service(f"{p.namespace}/{p.workload_name}").hpa_on_cpu]
    assert hpa and not any(p.allow_horizontal_conflict for p in hpa)


@pytest.mark.skipif(shutil.which("kubectl") is None, reason="kubectl not installed")
def test_examples_render_with_kustomize():
    # kubectl's built-in kustomize renders the examples folder (DESIGN.md "Manifests").
    out = subprocess.run(
        ["kubectl", "kustomize", str(ROOT / "manifests" / "examples")],
        check=True,
        capture_output=True,
        text=True,
        timeout=60,
    ).stdout
    docs = [d for d in yaml.safe_load_all(out) if d]
    assert sorted(d["metadata"]["name"] for d in docs) == sorted(
        yaml.safe_load(p.read_text())["metadata"]["name"] for p in POLICY_EXAMPLES
    )


BAD = [
    ("unknown kind", ["spec", "workload", "kind"], "DaemonSet"),
    ("unknown mode", ["spec", "mode"], "auto"),
    ("old mode spelling", ["spec", "mode"], "dry-run"),
    ("unknown resizeBy", ["spec", "resizeBy"], "Restart"),
    ("old resizeBy spelling", ["spec", "resizeBy"], "in-place"),
    ("unknown cpuLimit", ["spec", "cpuLimit"], "Scale"),
    ("deadband 100", ["spec", "deadbandPercent"], 100),
    ("negative deadband", ["spec", "deadbandPercent"], -1),
    ("fractional deadband", ["spec", "deadbandPercent"], 0.1),
    ("fractional headroom", ["spec", "headroomPercent"], 0.15),
    ("negative step increase", ["spec", "stepLimit", "maxIncreasePercent"], -1),
    ("step decrease 100", ["spec", "stepLimit", "maxDecreasePercent"], 100),
    ("fractional step decrease", ["spec", "stepLimit", "maxDecreasePercent"], 0.5),
    ("bad duration", ["spec", "cooldown"], "30 minutes"),
    ("duration order", ["spec", "settle"], "30m2h"),
    ("percentile 0", ["spec", "ratePercentile"], 0),
    ("percentile 101", ["spec", "ratePercentile"], 101),
    ("fractional percentile", ["spec", "ratePercentile"], 99.5),
    ("bad floor", ["spec", "containers", 0, "floor"], "1Gi"),
    ("unquoted decimal floor", ["spec", "containers", 0, "floor"], 0.5),
    ("negative ceiling", ["spec", "containers", 0, "ceiling"], "-1"),
    ("bad model key", ["spec", "containers", 0, "model"], "tracking-api"),
    ("no containers", ["spec", "containers"], []),
]


@pytest.mark.parametrize("case,path,value", BAD, ids=[b[0] for b in BAD])
def test_bad_policies_rejected_by_schema_and_parser(validator, case, path, value):
    obj = _example("label-printer.yaml")
    node = obj
    for part in path[:-1]:
        node = node[part]
    node[path[-1]] = value
    assert not validator.is_valid(obj), case
    with pytest.raises(PolicyInvalid) as exc:
        parse_policy(obj)
    # the parser names the field that is wrong
    dotted = "spec" + "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in path[1:])
    assert str(exc.value).split(": ", 1)[1].startswith(dotted) or dotted in str(exc.value), str(exc.value)


def test_missing_required_fields_rejected(validator):
    obj = _example("label-printer.yaml")
    del obj["spec"]["workload"]
    assert not validator.is_valid(obj)
    obj = _example("label-printer.yaml")
    del obj["spec"]["containers"][0]["model"]
    assert not validator.is_valid(obj)
    with pytest.raises(PolicyInvalid, match=r"spec\.containers\[0\]\.model"):
        parse_policy(obj)


# ---------------------------------------------------------------- through the sandbox and the real kubectl


def _status_from_a_real_decision() -> dict:
    from datetime import datetime, timezone

    from ratefit.controller.decide import ContainerInput, Sizing, decide_workload
    from ratefit.controller.policy import WorkloadHistory, history_to_status, make_condition
    from ratefit.controller.stages.record import summary_of

    policy = parse_policy(_example("label-printer.yaml"))
    now = datetime(2026, 12, 1, 12, 0, tzinfo=timezone.utc)
    wd = decide_workload(
        policy,
        [
            ContainerInput("app", 1000, 2000, 150.0, Sizing(0.65, 0.72)),
            ContainerInput("log-shipper", 200, None, 150.0, Sizing(0.04, 0.05)),
        ],
        history=WorkloadHistory(last_change=now),
        now=now,
    )
    cond = make_condition(
        type="Ready", status=True, reason="Decided", message="2 containers decided", observed_generation=1, now=now
    )
    return {
        "observedGeneration": 1,
        "effectiveMode": "Apply",
        "summary": summary_of(wd.decisions),
        "conditions": [cond],
        **history_to_status(wd.history, [d.to_status() for d in wd.decisions]),
    }


def test_crd_and_examples_through_kubectl_and_the_sandbox(kubectl):
    import json

    kubectl("apply", "-f", str(CRD_PATH), check=True)
    namespaces = [{"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": n}} for n in ("parcels", "dispatch")]
    kubectl("apply", "-f", "-", input=yaml.safe_dump_all(namespaces), check=True)
    kubectl("apply", "-k", str(ROOT / "manifests" / "examples"), check=True)

    table = kubectl("get", "rfp", "-A", check=True).stdout
    header = table.splitlines()[0].split()
    assert header[:3] == ["NAMESPACE", "NAME", "WORKLOAD"] and "MODE" in header and "AGE" in header
    assert "READY" in header and "LAST" in header and "SUMMARY" in header  # "LAST CHANGE"
    assert len(table.splitlines()) == 1 + len(POLICY_EXAMPLES)

    # the server filled in the CRD's defaults; the parser reads the stored object the same
    stored = json.loads(kubectl("get", "sizingpolicy", "route-planner", "-n", "parcels", "-o", "json", check=True).stdout)
    assert stored["spec"]["stepLimit"] == {"maxIncreasePercent": 100, "maxDecreasePercent": 50}
    assert (stored["spec"]["mode"], stored["spec"]["resizeBy"], stored["spec"]["headroomPercent"]) == ("DryRun", "Rollout", 15)
    # cooldown/settle/rateWindow have no CRD default: their default depends on resizeBy (issue 12)
    assert not {"cooldown", "settle", "rateWindow"} & set(stored["spec"])
    assert stored["spec"]["containers"][0].get("floor") == "200m"
    from_server = parse_policy(stored)
    from_file = parse_policy(_example("route-planner.yaml"))
    assert from_server == type(from_file)(**{**from_file.__dict__, "generation": from_server.generation})

    # a bad policy is refused and the message names the field
    bad = _example("label-printer.yaml")
    bad["metadata"]["name"] = "bad"
    bad["spec"]["deadbandPercent"] = 150
    out = kubectl("apply", "-f", "-", input=yaml.safe_dump(bad))
    assert out.returncode != 0 and "deadbandPercent" in out.stderr

    # the status subresource takes what decide writes; spec and generation stay
    status = _status_from_a_real_decision()
    before = json.loads(kubectl("get", "sizingpolicy", "label-printer", "-n", "parcels", "-o", "json", check=True).stdout)
    kubectl(
        "patch", "sizingpolicy", "label-printer", "-n", "parcels", "--subresource=status", "--type=merge",
        "-p", json.dumps({"status": status}), check=True,
    )
    after = json.loads(kubectl("get", "sizingpolicy", "label-printer", "-n", "parcels", "-o", "json", check=True).stdout)
    assert after["status"]["containers"] == status["containers"]
    assert after["status"]["lastChangeTime"] == status["lastChangeTime"]
    # Kubernetes docs (status subresource): status writes ignore spec; generation moves only on spec changes
    assert after["spec"] == before["spec"]
    assert after["metadata"]["generation"] == before["metadata"]["generation"]
    row = kubectl("get", "rfp", "label-printer", "-n", "parcels", "--no-headers", check=True).stdout.split()
    # Mode shows status.effectiveMode; Summary the verdict counts
    assert row[:3] == ["label-printer", "label-printer", "Apply"] and row[3] == "True"
    words = status["summary"].split()
    assert " ".join(row[4:4 + len(words)]) == status["summary"] and status["summary"].endswith("held")


def test_status_written_by_decide_fits_the_crd_and_the_status_model(validator, schema):
    from ratefit.controller.policy import SizingPolicyStatus

    obj = _example("label-printer.yaml")
    obj["status"] = _status_from_a_real_decision()
    errors = [f"{list(e.path)}: {e.message}" for e in validator.iter_errors(obj)]
    assert not errors, errors
    status = obj["status"]
    parsed = SizingPolicyStatus.model_validate(status)
    assert [p.model_dump(by_alias=True, exclude_none=True) for p in parsed.containers] == status["containers"]
    assert [c.model_dump(by_alias=True, exclude_none=True) for c in parsed.conditions] == status["conditions"]
    assert (parsed.last_change_time, parsed.observed_generation) == (status["lastChangeTime"], 1)
    # a held row has no new value; a changed one has
    by_name = {c["name"]: c for c in status["containers"]}
    assert all(("newRequest" in c) == (c["verdict"] in ("Changed", "Proposed")) for c in by_name.values())
    # the CRD's status fields are the status model's fields
    crd_status = schema["properties"]["status"]["properties"]
    fields = {(f.alias or n) for n, f in SizingPolicyStatus.model_fields.items()}
    assert set(crd_status) == fields
    from ratefit.controller.policy import ContainerStatusModel

    assert set(crd_status["containers"]["items"]["properties"]) == {
        (f.alias or n) for n, f in ContainerStatusModel.model_fields.items()
    }


_durations = st.from_regex(r"\A([0-9]{1,3}(ms|[ywdhms])){1,3}\Z") | st.text(alphabet="0123456789hms dwy.", max_size=8)


_SPEC = yaml.safe_load(CRD_PATH.read_text())["spec"]["versions"][0]["schema"]["openAPIV3Schema"]["properties"]["spec"]


@settings(deadline=None)
@given(_durations)
def test_duration_pattern_and_parser_agree(text):
    # what the API server lets through (the CRD's pattern) the controller can read
    from ratefit.controller.policy import parse_duration
    from ratefit.models.errors import InputError

    cooldown = _SPEC["properties"]["cooldown"]
    if jsonschema.Draft4Validator(cooldown).is_valid(text):
        parse_duration(text, allow_zero=True)  # must not raise
    else:
        with pytest.raises(InputError):
            if text.strip() != text:
                raise InputError("spaces")  # the parser strips spaces; the API server does not
            parse_duration(text, allow_zero=True)


@settings(deadline=None)
@given(st.from_regex(r"\A([0-9]{1,6}(\.[0-9]{0,4})?|\.[0-9]{1,4})m?\Z"))
def test_quantity_pattern_accepts_only_what_the_parser_reads(text):
    from ratefit.controller.quantity import parse_cpu

    floor = _SPEC["properties"]["containers"]["items"]["properties"]["floor"]
    assert jsonschema.Draft4Validator(floor).is_valid(text)
    assert parse_cpu(text) >= 0
