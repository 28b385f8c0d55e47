"""One model-key grammar: the CRD, the policy parser and the sizing API accept exactly the
same keys (issue 9, item 1).

Three independent readers of a key are compared on hand-picked and hypothesis-generated
keys:

- the CRD, as the API server applies it: the ``model`` property's ``pattern`` (RE2;
  its ``$`` is the end of the text, Python's ``\\Z``), its ``maxLength`` (characters)
  and its CEL rule ``!self.matches(...)`` (CEL ``matches`` is RE2 too);
- the policy parser (``controller/policy.py``'s pydantic ``ContainerSpec``);
- the sizing API itself (the real app, in-process): an item whose key is outside the
  grammar is answered ``invalid_model``; a key inside it ``unknown_model`` (the store
  is empty).

The Kubernetes rules behind the grammar (Kubernetes docs, "Object Names and IDs"): RFC
1123 labels of at most 63 characters for the namespace and the container, an RFC 1123
DNS subdomain of at most 253 characters for the workload.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from ratefit.controller.policy import ContainerSpec
from ratefit.models import keys
from ratefit.models.api import ApiSettings, create_app

CRD = Path(__file__).resolve().parent.parent / "manifests" / "crd" / "sizingpolicy.yaml"


def _model_property() -> dict[str, Any]:
    doc = yaml.safe_load(CRD.read_text())

    def find(node: Any) -> dict[str, Any] | None:
        if isinstance(node, dict):
            model = node.get("model")
            if isinstance(model, dict) and "pattern" in model:
                return model
            for v in node.values():
                if (hit := find(v)) is not None:
                    return hit
        elif isinstance(node, list):
            for v in node:
                if (hit := find(v)) is not None:
                    return hit
        return None

    found = find(doc)
    assert found is not None, "no model property with a pattern in the CRD"
    return found


MODEL = _model_property()
_PATTERN = re.compile(MODEL["pattern"].removesuffix("$") + r"\Z")
_RULES = [r["rule"] for r in MODEL.get("x-kubernetes-validations", [])]


def crd_accepts(key: str) -> bool:
    if len(key) > MODEL["maxLength"] or not _PATTERN.match(key):
        return False
    for rule in _RULES:
        m = re.fullmatch(r"!self\.matches\('(.*)'\)", rule)
        assert m, f"a CEL rule this test cannot read: {rule}"
        if re.search(m.group(1), key):
            return False
    return True


def policy_accepts(key: str) -> bool:
    try:
        ContainerSpec.model_validate({"name": "app", "model": key})
    except ValidationError:
        return False
    return True


@pytest.fixture(scope="module")
def api(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    store = tmp_path_factory.mktemp("grammar") / "store"
    store.mkdir()
    with TestClient(create_app(ApiSettings(store=store))) as c:
        yield c


def api_accepts(client: TestClient, batch: list[str]) -> list[bool]:
    r = client.post("/v1/demand", json={"items": [{"model": k, "rate": 1.0} for k in batch]})
    assert r.status_code == 200, r.text
    reasons = [it["reason"] for it in r.json()["items"]]
    assert set(reasons) <= {"unknown_model", "invalid_model"}, reasons
    return [reason == "unknown_model" for reason in reasons]


def test_the_crd_carries_the_grammar_of_models_keys() -> None:
    assert MODEL["pattern"] == keys.KEY_PATTERN
    assert MODEL["maxLength"] == keys.MAX_KEY_LENGTH == 63 + 1 + 253 + 1 + 63
    assert _RULES == [keys.CRD_WORKLOAD_RULE]


L63, L64 = "a" * 63, "a" * 64
HAND_PICKED = {
    # key: accepted (Kubernetes docs, "Object Names and IDs")
    "shop/checkout/app": True,
    "shop/checkout.v2/app": True,  # '.' is allowed in a subdomain
    f"{L63}/w/{L63}": True,  # labels of exactly 63
    f"{L64}/w/c": False,  # a namespace of 64
    f"n/w/{L64}": False,  # a container of 64
    "n/" + "w" * 253 + "/c": True,  # a workload of exactly 253
    "n/" + "w" * 254 + "/c": False,  # a workload of 254
    "n/" + ".".join(["a" * 70] * 3) + "/c": True,  # labels inside a subdomain are not capped at 63
    "Shop/checkout/app": False,  # upper case
    "shop/Checkout/app": False,  # upper case in the workload (the old CRD pattern took it)
    "shop/check_out/app": False,  # '_' (the old CRD pattern took it in the workload)
    "shop/checkout/app_1": False,
    "shop/checkout/app\n": False,  # a final newline ($ in Python would take it)
    "shop/-x/app": False,
    "shop/x-/app": False,
    "shop/a..b/app": False,
    "shop/.a/app": False,
    "shop/a./app": False,
    "shop/checkout": False,
    "shop/checkout/app/x": False,
    "shop//app": False,
    "s.hop/checkout/app": False,  # a namespace is a label: no '.' (the old CRD pattern took it)
    "": False,
}


def test_hand_picked_keys(api: TestClient) -> None:
    batch = list(HAND_PICKED)
    got_api = api_accepts(api, batch)
    for key, via_api in zip(batch, got_api):
        want = HAND_PICKED[key]
        assert (crd_accepts(key), policy_accepts(key), via_api, keys.is_key(key)) == (want,) * 4, repr(key[:80])


label = st.from_regex(r"\A[a-z0-9]([-a-z0-9]{0,70}[a-z0-9])?\Z")
near_label = st.text(alphabet="abcxyz019-._AZ\n", min_size=0, max_size=70)
subdomain = st.lists(st.one_of(label, near_label), min_size=1, max_size=6).map(".".join)
key_like = st.one_of(
    st.tuples(label, subdomain, label).map("/".join),
    st.tuples(st.one_of(label, near_label), st.one_of(subdomain, near_label), st.one_of(label, near_label)).map(
        "/".join
    ),
    st.text(max_size=40),
    st.from_regex(keys.KEY_PATTERN, fullmatch=True),
    st.builds(lambda n: f"ns/{'w' * n}/c", st.integers(240, 260)),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(batch=st.lists(key_like, min_size=1, max_size=25))
def test_generated_keys_get_the_same_verdict_everywhere(api: TestClient, batch: list[str]) -> None:
    via_api = api_accepts(api, batch)
    for key, a in zip(batch, via_api):
        verdicts = (crd_accepts(key), policy_accepts(key), a, keys.is_key(key))
        assert len(set(verdicts)) == 1, (repr(key[:80]), verdicts)


def test_parse_key_never_echoes_the_key() -> None:
    from ratefit.models.errors import InputError

    for bad in ("Secret-Value/x/y", "n/" + "w" * 300 + "/c", "a/b"):
        with pytest.raises(InputError) as info:
            keys.parse_key(bad)
        assert bad not in str(info.value) and "Secret" not in str(info.value)
