"""Property-based fuzzing of the sizing API (hypothesis): whatever the body, the query
string or the path, the answer is never a 5xx (RFC 9110 §15.6: 5xx means the server
failed; bad input is the client's error, a 4xx). Bounded to about 200 examples in all,
in-process through FastAPI's TestClient (the route suite runs the same app under uvicorn).
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from urllib.parse import quote

import pytest
from api_fixtures import demo_keys, write_store
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ratefit.models.api import ApiSettings, create_app
from ratefit.models.api_schemas import ITEM_ERROR_REASONS

KEYS = demo_keys(5)
FUZZ = settings(
    max_examples=70, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow]
)


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    store = tmp_path_factory.mktemp("fuzz") / "store"
    write_store(store, len(KEYS), keys=KEYS)
    with TestClient(create_app(ApiSettings(store=store, max_batch=200))) as c:
        yield c


numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(),  # unbounded: 10**400 and beyond
    st.integers(min_value=-(10**30), max_value=10**30),
    st.sampled_from([0, 0.0, -0.0, 1e308, 1e-320, 2**63, -(2**63) - 1, 5e-324]),
)
scalars = st.one_of(st.none(), st.booleans(), numbers, st.text(max_size=20))
json_values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)),
    max_leaves=12,
)
model_values = st.one_of(
    st.sampled_from(KEYS),
    st.sampled_from(["shop/absent/app", "a/b/c", "Shop/x/y", "a//c", "/", "a/b", "a/b/c/d", "x" * 70 + "/a/b"]),
    st.text(max_size=40),
    scalars,
)
items = st.lists(
    st.one_of(
        st.fixed_dictionaries({"model": model_values, "rate": st.one_of(numbers, scalars)}),
        st.dictionaries(st.sampled_from(["model", "rate", "rates", "key", ""]), json_values, max_size=3),
        json_values,
    ),
    max_size=8,
)
bodies = st.one_of(
    st.builds(lambda xs: {"items": xs}, items),
    st.dictionaries(st.sampled_from(["items", "item", "model"]), json_values, max_size=2),
    json_values,
)


def _dump(value: object) -> bytes:
    # allow_nan=True on purpose: Python writes NaN/Infinity tokens, which are not JSON (RFC 8259 §6)
    return json.dumps(value, allow_nan=True).encode()


@FUZZ
@given(body=bodies)
def test_batch_bodies_never_give_a_5xx(client: TestClient, body: object) -> None:
    r = client.post("/v1/demand", content=_dump(body), headers={"content-type": "application/json"})
    assert r.status_code < 500, r.text
    if r.status_code == 200:
        out = r.json()["items"]
        assert isinstance(body, dict) and len(out) == len(body["items"])
        for item, ans in zip(body["items"], out):
            # issue 9: every item answered on its own; an invalid model is never echoed
            good_item = (
                isinstance(item, dict)
                and set(item) == {"model", "rate"}
                and item["model"] in KEYS
                and type(item["rate"]) in (int, float)
                and math.isfinite(item["rate"])
                and 0 <= item["rate"] <= 1e9
            )
            if good_item and item["rate"] * 0.007 + 0.1 <= 1024:  # within the 1,024-core bound
                assert "error" not in ans, ans
            if "error" in ans:
                assert ans["reason"] in ITEM_ERROR_REASONS and ans["field"].startswith("items.")
                assert ans["model"] is None or ans["model"] == item["model"]
            else:
                assert ans["model"] == item["model"] and good_item
                assert isinstance(ans["demand_m"], int) and ans["demand_bound_m"] >= ans["demand_m"] >= 0
                assert math.isfinite(ans["rate"]) and ans["rate"] >= 0
    else:
        assert r.json()["error"]


@FUZZ
@given(raw=st.binary(max_size=200))
def test_raw_bytes_never_give_a_5xx(client: TestClient, raw: bytes) -> None:
    r = client.post("/v1/demand", content=raw, headers={"content-type": "application/json"})
    assert 400 <= r.status_code < 500 or (r.status_code == 200 and raw.strip().startswith(b"{")), r.text
    assert client.post("/v1/demand", content=raw).status_code == 415  # undeclared body: never parsed


path_part = st.one_of(st.sampled_from(["shop", "wl-00000", "app", "x.y", "A", "-a", "a" * 64]), st.text(max_size=12))
query_value = st.one_of(
    st.sampled_from(["nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-0", "0x1p3", "1_000", " 1", "1e9", "1e9.1"]),
    numbers.map(str),
    st.text(max_size=15),
)


@FUZZ
@given(ns=path_part, wl=path_part, ct=path_part, rate=query_value, extra=st.dictionaries(st.text(max_size=5), st.text(max_size=5), max_size=2))
def test_paths_and_query_strings_never_give_a_5xx(
    client: TestClient, ns: str, wl: str, ct: str, rate: str, extra: dict[str, str]
) -> None:
    path = f"/v1/models/{quote(ns, safe='')}/{quote(wl, safe='')}/{quote(ct, safe='')}/demand"
    r = client.get(path, params={"rate": rate, **extra})
    assert r.status_code < 500, r.text
    if r.status_code == 200:
        body = r.json()
        assert math.isfinite(body["rate"]) and 0 <= body["rate"] <= 1e9
    r2 = client.get(f"/v1/models/{quote(ns, safe='')}/{quote(wl, safe='')}/{quote(ct, safe='')}")
    assert r2.status_code < 500, r2.text


@pytest.fixture(scope="module")
def slow_client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    store = tmp_path_factory.mktemp("fuzz-slow") / "store"
    write_store(store, len(KEYS), keys=KEYS)
    with TestClient(create_app(ApiSettings(store=store, max_batch=200), fast_path=False)) as c:
        yield c


number_text = st.one_of(
    st.floats(min_value=0, max_value=2e9).map(repr),
    st.from_regex(r"\A[0-9.eE+\-]{1,12}\Z"),
    query_value,
)


@FUZZ
@given(key=st.one_of(st.sampled_from(KEYS), path_part.map(lambda p: f"shop/{p}/app")), rate=number_text)
def test_fast_path_answers_like_the_fastapi_route(
    client: TestClient, slow_client: TestClient, key: str, rate: str
) -> None:
    # same store content, one app with the fast path (models/api_fastpath.py), one without:
    # status and body must be identical for every query (versions agree: same artifacts)
    path = f"/v1/models/{quote(key, safe='/')}/demand"
    a = client.get(path, params={"rate": rate})
    b = slow_client.get(path, params={"rate": rate})
    assert a.status_code == b.status_code
    assert a.content == b.content


@pytest.fixture(scope="module")
def token_client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    store = tmp_path_factory.mktemp("fuzz-token") / "store"
    write_store(store, 1, keys=KEYS[:1])
    with TestClient(create_app(ApiSettings(store=store, token="s3cr3t-fuzz"))) as c:
        yield c


@FUZZ
@given(
    value=st.one_of(
        st.binary(max_size=40).filter(lambda b: b"\r" not in b and b"\n" not in b and b"\x00" not in b),
        st.sampled_from([b"Bearer s3cr3t-fuzz", b"bearer s3cr3t-fuzz", b"Bearer  s3cr3t-fuzz ", b"Bearer s3cr3t-fuz"]),
    ),
    path=st.sampled_from(["/readyz", f"/v1/models/{KEYS[0]}/demand?rate=1", "/v1/models", "/metrics"]),
)
def test_authorization_headers_give_200_or_401_only(token_client: TestClient, value: bytes, path: str) -> None:
    r = token_client.get(path, headers={"Authorization": value})
    scheme, _, rest = value.partition(b" ")
    valid = scheme.lower() == b"bearer" and rest.strip(b" \t") == b"s3cr3t-fuzz"
    # RFC 6750 §3.1: an invalid or missing token is answered 401
    assert r.status_code == (200 if valid else 401), (value, r.status_code)
