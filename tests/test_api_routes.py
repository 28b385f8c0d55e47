"""The sizing API's routes, run twice: in-process (FastAPI's TestClient) and against a
real ``ratefit serve`` subprocess on a loopback port (uvicorn, HTTP over TCP).

Expected answers come from outside the API code: each test artifact is tabulated from
a known linear curve ``cpu = base + slope × rate`` (so the demand at a rate is known
in closed form), and from ``ratefit predict`` (the CLI's own lookup) where it exists.
Status codes follow RFC 9110 (404 Not Found, 413 Content Too Large, 422 Unprocessable
Content) and RFC 6750 §3 (401 with ``WWW-Authenticate: Bearer``).
"""

from __future__ import annotations

import json
import math
import random
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
from api_fixtures import RATEFIT, demo_keys, expected, make_artifact, serve_process, write_store
from fastapi.testclient import TestClient

from ratefit.models.api import ApiSettings, create_app
from ratefit.models.api_schemas import DemandBatchOut, DemandOut, ModelDetail, ModelList, ReadyOut
from ratefit.models.store import Artifact, ModelStore

TOKEN = "route-suite-token-5b1f"  # invented
MAX_BATCH = 1000
LOW_KEY = "media/starts-late/app"  # trained on [10, 80] req/s only
BASE, SLOPE = 0.05, 0.004  # the curve of LINEAR_KEY, cores and cores per req/s
LINEAR_KEY = "shop/checkout.v2/app"


@dataclass
class Api:
    client: httpx.Client
    base_url: str
    artifacts: dict[str, Artifact]
    store: Path
    anon_factory: Any = None
    extra: dict[str, Any] = field(default_factory=dict)

    def anon(self) -> httpx.Client:
        return self.anon_factory()


@pytest.fixture(scope="module")
def store_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("routes") / "store"
    write_store(root, 30)
    s = ModelStore(root)
    s.save(make_artifact(LOW_KEY, rate_lo=10.0, rate_hi=80.0, base=0.1, slope=0.01))
    s.save(make_artifact(LINEAR_KEY, base=BASE, slope=SLOPE, rate_hi=500.0, band=0.03))
    return root


@pytest.fixture(scope="module", params=["testclient", "serve"])
def api(request: pytest.FixtureRequest, store_dir: Path) -> Iterator[Api]:
    arts = ModelStore(store_dir).load_all().artifacts
    if request.param == "testclient":
        app = create_app(ApiSettings(store=store_dir, token=TOKEN, max_batch=MAX_BATCH))
        with TestClient(app, headers={"Authorization": f"Bearer {TOKEN}"}) as c:
            yield Api(c, "http://testserver", arts, store_dir, anon_factory=lambda: TestClient(app))
    else:
        with serve_process(store_dir, token=TOKEN, extra_args=["--max-batch", str(MAX_BATCH)]) as srv:
            with srv.client() as c:
                yield Api(
                    c,
                    srv.base_url,
                    arts,
                    store_dir,
                    anon_factory=lambda: httpx.Client(base_url=srv.base_url, timeout=10.0),
                    extra={"server": srv},
                )


# -- probes and auth ----------------------------------------------------------------------
def test_healthz_needs_no_token(api: Api) -> None:
    with api.anon() as anon:
        r = anon.get("/healthz")
    assert r.status_code == 200
    assert r.json() == {"status": "ok"}


@pytest.mark.parametrize(
    "method,path",
    [
        ("GET", "/readyz"),
        ("GET", "/metrics"),
        ("GET", "/v1/models"),
        ("GET", f"/v1/models/{LINEAR_KEY}"),
        ("GET", f"/v1/models/{LINEAR_KEY}/demand?rate=1"),
        ("POST", "/v1/demand"),
        ("POST", "/v1/reload"),
        ("GET", "/openapi.json"),
        ("GET", "/docs"),
    ],
)
@pytest.mark.parametrize("auth", [None, "Bearer wrong-token", f"Basic {TOKEN}", "Bearer", f"Bearer {TOKEN}x"])
def test_every_route_but_healthz_needs_the_token(api: Api, method: str, path: str, auth: str | None) -> None:
    headers = {"Authorization": auth} if auth is not None else {}
    with api.anon() as anon:
        r = anon.request(method, path, headers=headers, json={"items": []} if method == "POST" else None)
    # RFC 6750 §3: a request without valid credentials gets 401 and a WWW-Authenticate: Bearer challenge
    assert r.status_code == 401
    assert r.headers["www-authenticate"].startswith("Bearer")
    assert "token" in r.json()["error"]


def test_readyz_reports_the_loaded_store(api: Api) -> None:
    r = api.client.get("/readyz")
    assert r.status_code == 200
    body = ReadyOut.model_validate(r.json())
    assert body.ready and body.model_count == len(api.artifacts) and body.refused_count == 0


# -- models ---------------------------------------------------------------------------------
def test_list_models_lists_every_artifact(api: Api) -> None:
    r = api.client.get("/v1/models")
    assert r.status_code == 200
    body = ModelList.model_validate(r.json())
    assert {m.model for m in body.models} == set(api.artifacts)
    assert body.model_count == len(api.artifacts) and body.store_version
    for m in body.models:
        art = api.artifacts[m.model]
        assert (m.version, m.chosen, m.coverage) == (art.version, art.chosen, art.coverage)
        assert tuple(m.rate_range) == tuple(art.rate_range)
    assert body.refused == []


def test_model_detail_has_the_cv_table(api: Api) -> None:
    r = api.client.get(f"/v1/models/{LINEAR_KEY}")
    assert r.status_code == 200
    body = ModelDetail.model_validate(r.json())
    art = api.artifacts[LINEAR_KEY]
    assert [row["model"] for row in body.cv] == [row.model for row in art.cv]
    assert body.cv[1]["rmse"] == art.cv[1].rmse
    assert body.band_m == 30  # band 0.03 cores = 30m
    assert body.content_hash == art.content_hash


@pytest.mark.parametrize("path", ["/v1/models/shop/nothing-here/app", "/v1/models/shop/nothing-here/app/demand?rate=3"])
def test_unknown_model_is_404_naming_the_key(api: Api, path: str) -> None:
    r = api.client.get(path)
    assert r.status_code == 404
    assert r.json()["model"] == "shop/nothing-here/app"
    # the message says what to do and never repeats the key (API.md: values are never echoed)
    assert "shop/nothing-here/app" not in r.json()["error"] and "train" in r.json()["error"]


# -- single demand ----------------------------------------------------------------------------
@pytest.mark.parametrize("rate", [0.0, 1.0, 37.25, 123.456, 499.999, 500.0])
def test_single_demand_matches_the_generating_curve(api: Api, rate: float) -> None:
    r = api.client.get(f"/v1/models/{LINEAR_KEY}/demand", params={"rate": rate})
    assert r.status_code == 200
    body = DemandOut.model_validate(r.json()).model_dump()
    assert body == expected(api.artifacts[LINEAR_KEY], rate)
    # closed form: demand = BASE + SLOPE·rate cores, rounded up to whole millicores (1m is
    # Kubernetes' CPU precision, Kubernetes docs "Resource units in Kubernetes"); the tabulated
    # curve of a straight line is exact up to floating-point error, hence ±1m
    true_m = (BASE + SLOPE * rate) * 1000.0
    assert abs(body["demand_m"] - math.ceil(true_m)) <= 1
    assert abs(body["demand_bound_m"] - math.ceil(true_m + 30.0)) <= 1
    assert body["extrapolated"] is False


def test_single_demand_flags_extrapolation_both_ways(api: Api) -> None:
    above = api.client.get(f"/v1/models/{LINEAR_KEY}/demand", params={"rate": 1000.0}).json()
    assert above["extrapolated"] is True
    # above the range the curve continues linearly with its top slope: still BASE + SLOPE·rate
    assert abs(above["demand_m"] - math.ceil((BASE + SLOPE * 1000.0) * 1000.0)) <= 1
    below = api.client.get(f"/v1/models/{LOW_KEY}/demand", params={"rate": 2.0}).json()
    at_lo = api.client.get(f"/v1/models/{LOW_KEY}/demand", params={"rate": 10.0}).json()
    assert below["extrapolated"] is True and at_lo["extrapolated"] is False
    assert below["demand_m"] == at_lo["demand_m"]  # held at the value at rate_lo, never extrapolated down


def test_single_answers_carry_server_timing(api: Api) -> None:
    r = api.client.get(f"/v1/models/{LINEAR_KEY}/demand", params={"rate": 5})
    # W3C Server Timing: "name;dur=<milliseconds>"
    name, _, dur = r.headers["server-timing"].partition(";dur=")
    assert name == "app" and float(dur) >= 0


# -- batch ------------------------------------------------------------------------------------
def test_batch_answers_in_request_order_with_per_item_errors(api: Api) -> None:
    rnd = random.Random(11)
    keys = sorted(api.artifacts)
    items = [{"model": rnd.choice(keys), "rate": round(rnd.uniform(0, 700), 3)} for _ in range(300)]
    items.insert(17, {"model": "shop/gone/app", "rate": 4.0})
    items.append({"model": "bank/gone.too/side", "rate": 0})
    r = api.client.post("/v1/demand", json={"items": items})
    assert r.status_code == 200
    out = DemandBatchOut.model_validate(r.json()).items
    assert len(out) == len(items)
    for item, ans in zip(items, out):
        assert ans.model == item["model"] and ans.rate == float(item["rate"])
        if item["model"] in api.artifacts:
            assert ans.error is None
            assert ans.model_dump(exclude={"error", "reason", "field"}) == expected(api.artifacts[item["model"]], item["rate"])
        else:
            assert ans.demand_m is None and ans.error and ans.reason == "unknown_model"
            assert item["model"] not in ans.error  # never echoed in a message


def test_batch_equals_single_lookups(api: Api) -> None:
    items = [{"model": k, "rate": r} for k in sorted(api.artifacts)[:6] for r in (0.0, 3.3, 150.0, 900.0)]
    batch = api.client.post("/v1/demand", json={"items": items}).json()["items"]
    for item, ans in zip(items, batch):
        single = api.client.get(f"/v1/models/{item['model']}/demand", params={"rate": item["rate"]}).json()
        assert ans == single


def test_empty_batch_is_an_empty_answer(api: Api) -> None:
    r = api.client.post("/v1/demand", json={"items": []})
    assert r.status_code == 200 and r.json() == {"items": []}


def test_batch_cap_names_the_field(api: Api) -> None:
    key = sorted(api.artifacts)[0]
    r = api.client.post("/v1/demand", json={"items": [{"model": key, "rate": 1.0}] * (MAX_BATCH + 1)})
    assert r.status_code == 422
    assert r.json()["errors"][0]["field"] == "items"
    assert str(MAX_BATCH) in r.json()["error"]
    ok = api.client.post("/v1/demand", json={"items": [{"model": key, "rate": 1.0}] * MAX_BATCH})
    assert ok.status_code == 200 and len(ok.json()["items"]) == MAX_BATCH


def test_oversized_body_is_413(api: Api) -> None:
    r = api.client.post(
        "/v1/demand", content=b'{"items": [' + b" " * (MAX_BATCH * 600) + b"]}", headers={"content-type": "application/json"}
    )
    assert r.status_code == 413 and "items" in r.json()["error"]


# -- bad input: always a 4xx naming the field, never a 5xx -----------------------------------
_K = LINEAR_KEY
BAD_SINGLE = [
    ("rate=nan", "rate (query)"),
    ("rate=NaN", "rate (query)"),
    ("rate=inf", "rate (query)"),
    ("rate=-Infinity", "rate (query)"),
    ("rate=1e400", "rate (query)"),
    ("rate=1e300", "rate (query)"),
    ("rate=-1", "rate (query)"),
    ("rate=abc", "rate (query)"),
    ("rate=", "rate (query)"),
    ("", "rate (query)"),
    ("rate=0x10", "rate (query)"),
]


@pytest.mark.parametrize("query,field_name", BAD_SINGLE)
def test_bad_rate_in_query_is_422_naming_rate(api: Api, query: str, field_name: str) -> None:
    r = api.client.get(f"/v1/models/{_K}/demand?{query}")
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == field_name


@pytest.mark.parametrize(
    "path,field_name",
    [
        ("/v1/models/Shop/x/app/demand?rate=1", "namespace (path)"),
        ("/v1/models/shop/x_y/app/demand?rate=1", "workload (path)"),
        ("/v1/models/shop/x/-app/demand?rate=1", "container (path)"),
        (f"/v1/models/{'a' * 64}/x/app/demand?rate=1", "namespace (path)"),
        (f"/v1/models/shop/x/{'c' * 64}", "container (path)"),
        ("/v1/models/shop/x./app", "workload (path)"),
    ],
)
def test_bad_key_in_path_is_422_naming_the_part(api: Api, path: str, field_name: str) -> None:
    r = api.client.get(path)
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == field_name


# Issue 9: a problem of one item is that item's own error (200, the other items answered);
# only a body malformed as a whole is a 422.
BAD_ITEMS: list[tuple[bytes, str, str]] = [
    (b'{"items":[{"model":"shop/a/b","rate":NaN}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":Infinity}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":-Infinity}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":1e999}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":' + b"9" * 400 + b"}]}", "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":-0.5}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":"5"}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":true}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b","rate":null}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"model":"shop/a/b"}]}', "items.0.rate", "invalid_rate"),
    (b'{"items":[{"rate":1}]}', "items.0.model", "invalid_model"),
    (b'{"items":[{"model":"' + LINEAR_KEY.encode() + b'","rate":1},{"model":"Shop/a/b","rate":1}]}', "items.1.model", "invalid_model"),
    (b'{"items":[{"model":"shop/a","rate":1}]}', "items.0.model", "invalid_model"),
    (b'{"items":[{"model":5,"rate":1}]}', "items.0.model", "invalid_model"),
    (b'{"items":[{"model":"' + b"a" * 64 + b'/w/c","rate":1}]}', "items.0.model", "invalid_model"),
    (b'{"items":[{"model":"a/' + b"w" * 254 + b'/c","rate":1}]}', "items.0.model", "invalid_model"),
    (b'{"items":[{"model":"shop/a/b","rate":1,"rates":2}]}', "items.0.rates", "invalid_item"),
    (b'{"items":[7]}', "items.0", "invalid_item"),
]
BAD_BODIES: list[tuple[bytes, str]] = [
    (b'{"items":{"model":"shop/a/b","rate":1}}', "items"),
    (b'{"items":null}', "items"),
    (b'{"item":[]}', "items"),
    (b"[]", "body"),
    (b"", "body"),
    (b"{", "body"),
    (b"\xff\xfe\x00", "body"),
    (b'"items"', "body"),
]


@pytest.mark.parametrize("body,field_name,reason", BAD_ITEMS, ids=[f"i{i}" for i in range(len(BAD_ITEMS))])
def test_bad_item_is_its_own_error_and_the_rest_are_answered(
    api: Api, body: bytes, field_name: str, reason: str
) -> None:
    good = {"model": LINEAR_KEY, "rate": 10.0}
    doc = body[: -2] + b"," + json.dumps(good).encode() + b"]}"  # one good item after the bad one(s)
    r = api.client.post("/v1/demand", content=doc, headers={"content-type": "application/json"})
    assert r.status_code == 200, r.text
    items = DemandBatchOut.model_validate(r.json()).items
    errs = [it for it in items if it.error]
    assert [(e.field, e.reason) for e in errs] == [(field_name, reason)]
    assert errs[0].demand_m is None and errs[0].demand_bound_m is None
    assert items[-1].model_dump(exclude={"error", "reason", "field"}) == expected(api.artifacts[LINEAR_KEY], 10.0)
    # an invalid value is never echoed: neither in the message nor in the entry
    assert b"Shop/a/b" not in r.content and b"aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa" not in r.content


@pytest.mark.parametrize("body,field_name", BAD_BODIES, ids=[f"b{i}" for i in range(len(BAD_BODIES))])
def test_malformed_body_is_422_naming_the_field(api: Api, body: bytes, field_name: str) -> None:
    r = api.client.post("/v1/demand", content=body, headers={"content-type": "application/json"})
    assert r.status_code == 422, r.text
    fields = [e["field"] for e in r.json()["errors"]]
    assert field_name in fields, fields
    assert r.json()["error"]


@pytest.mark.parametrize("content_type", [None, "text/plain", "application/x-www-form-urlencoded", "multipart/form-data"])
def test_a_body_not_declared_json_is_415(api: Api, content_type: str | None) -> None:
    key = sorted(api.artifacts)[0]
    body = json.dumps({"items": [{"model": key, "rate": 1.0}]}).encode()
    headers = {"content-type": content_type} if content_type else {}
    r = api.client.post("/v1/demand", content=body, headers=headers)
    assert r.status_code == 415, r.text  # RFC 9110 §15.5.16 Unsupported Media Type
    assert "application/json" in r.json()["error"]
    ok = api.client.post("/v1/demand", content=body, headers={"content-type": "application/json; charset=utf-8"})
    assert ok.status_code == 200


def test_out_of_range_item_is_its_own_error(api: Api) -> None:
    # 1e9 req/s on a slope of 0.004 cores per req/s: 4,000,000 cores, beyond the 1,024-core bound
    items = [{"model": LINEAR_KEY, "rate": 1e9}, {"model": LINEAR_KEY, "rate": 1.0}]
    out = api.client.post("/v1/demand", json={"items": items}).json()["items"]
    assert out[0]["reason"] == "out_of_range" and "demand_m" not in out[0]
    assert out[1] == expected(api.artifacts[LINEAR_KEY], 1.0)


def test_unknown_route_and_method_are_4xx(api: Api) -> None:
    assert api.client.get("/v2/nothing").status_code == 404
    assert api.client.delete("/v1/demand").status_code == 405
    assert api.client.get("/v1/demand").status_code == 405


# -- OpenAPI ------------------------------------------------------------------------------------
def test_openapi_documents_every_route_with_examples(api: Api) -> None:
    doc = api.client.get("/openapi.json").json()
    paths = doc["paths"]
    for p in [
        "/healthz",
        "/readyz",
        "/metrics",
        "/v1/models",
        "/v1/models/{namespace}/{workload}/{container}",
        "/v1/models/{namespace}/{workload}/{container}/demand",
        "/v1/demand",
        "/v1/reload",
    ]:
        assert p in paths, p
    schemas = doc["components"]["schemas"]
    ref = paths["/v1/demand"]["post"]["requestBody"]["content"]["application/json"]["schema"]["$ref"]
    name = ref.rsplit("/", 1)[1]
    assert name in schemas and "examples" in schemas[name]
    item_ref = schemas[name]["properties"]["items"]["items"]["$ref"].rsplit("/", 1)[1]
    assert set(schemas[item_ref]["properties"]) == {"model", "rate"}
    assert "examples" in schemas["DemandOut"]
    assert "DemandBatchOut" in schemas
    assert api.client.get("/docs").status_code == 200


# -- against `ratefit predict` ---------------------------------------------------------------
@pytest.mark.parametrize("rate", [0.0, 42.5, 180.0, 750.0])
def test_answers_equal_ratefit_predict(api: Api, rate: float) -> None:
    for key in (LINEAR_KEY, LOW_KEY):
        cli = subprocess.run(
            [str(RATEFIT), "predict", key, "--store", str(api.store), "--rate", repr(rate), "--output", "json"],
            capture_output=True,
            text=True,
            timeout=60,
            check=True,
        )
        want = json.loads(cli.stdout)
        single = api.client.get(f"/v1/models/{key}/demand", params={"rate": rate}).json()
        batch = api.client.post("/v1/demand", json={"items": [{"model": key, "rate": rate}]}).json()["items"][0]
        for got in (single, batch):
            assert (got["demand_m"], got["demand_bound_m"], got["extrapolated"]) == (
                want["demand_m"],
                want["demand_bound_m"],
                want["extrapolated"],
            )


# -- in-process only ----------------------------------------------------------------------------
def test_default_batch_cap_is_50000(tmp_path: Path) -> None:
    write_store(tmp_path / "store", 1)
    key = demo_keys(1)[0]
    app = create_app(ApiSettings(store=tmp_path / "store"))
    with TestClient(app) as c:
        over = c.post("/v1/demand", json={"items": [{"model": key, "rate": 1.0}] * 50_001})
        assert over.status_code == 422 and over.json()["errors"][0]["field"] == "items"
        at = c.post("/v1/demand", json={"items": [{"model": key, "rate": 1.0}] * 50_000})
        assert at.status_code == 200 and len(at.json()["items"]) == 50_000


def test_without_token_everything_is_open(tmp_path: Path) -> None:
    write_store(tmp_path / "store", 2)
    with TestClient(create_app(ApiSettings(store=tmp_path / "store"))) as c:
        assert c.get("/readyz").status_code == 200
        assert c.get("/v1/models").status_code == 200


def test_not_ready_until_loaded_and_503_on_model_routes(tmp_path: Path) -> None:
    # a store that vanished: the app starts, says it is not ready and answers 503, not 500
    app = create_app(ApiSettings(store=tmp_path / "missing"))
    with TestClient(app) as c:
        r = c.get("/readyz")
        assert r.status_code == 503 and r.json()["ready"] is False
        assert c.get("/v1/models").status_code == 503
        assert c.get(f"/v1/models/{LINEAR_KEY}/demand?rate=1").status_code == 503
        assert c.post("/v1/demand", json={"items": []}).status_code == 503
        rel = c.post("/v1/reload")
        assert rel.status_code == 503 and rel.json()["ok"] is False and "not a directory" in rel.json()["error"]


def test_serve_cli_refuses_a_missing_store(tmp_path: Path) -> None:
    out = subprocess.run(
        [str(RATEFIT), "serve", "--store", str(tmp_path / "nope")], capture_output=True, text=True, timeout=60
    )
    assert out.returncode == 2
    assert "is not a directory" in out.stderr and "--store" in out.stderr


def test_serve_stops_gracefully_on_sigterm_and_never_logs_the_token(store_dir: Path, tmp_path: Path) -> None:
    with serve_process(store_dir, token=TOKEN, workdir=tmp_path) as srv:
        with srv.client() as c:
            assert c.get(f"/v1/models/{LINEAR_KEY}/demand", params={"rate": 1}).status_code == 200
            with httpx.Client(base_url=srv.base_url) as anon:
                assert anon.get("/v1/models", headers={"Authorization": "Bearer not-it"}).status_code == 401
        code = srv.stop()
    # uvicorn finishes its shutdown, then re-raises SIGTERM (exit by the signal: -15 here, 143 in a shell)
    assert code in (0, -15)
    log = srv.log_text()
    assert "Application shutdown complete" in log
    assert TOKEN not in log and "not-it" not in log
    lines = [json.loads(line) for line in log.splitlines() if line.startswith("{")]
    access = [rec for rec in lines if rec["logger"] == "ratefit.api.access"]
    demand = next(rec for rec in access if rec["route"].endswith("/demand"))
    assert demand["method"] == "GET" and demand["status"] == 200 and demand["duration_ms"] >= 0
    assert demand["client"].startswith("127.0.0.1:")
    assert any(rec["status"] == 401 for rec in access)


# -- the fast path (models/api_fastpath.py) and FastAPI's route agree -------------------------
@pytest.mark.parametrize("rate", ["0", "7", "12.5", "1.", ".25", "5.e2", "1E2", "25e-1", "99999", "255000"])
def test_fast_path_and_fastapi_route_give_the_same_answer(api: Api, rate: str) -> None:
    path = f"/v1/models/{LINEAR_KEY}/demand"
    fast = api.client.get(f"{path}?rate={rate}")  # the plain form: answered by the fast path
    # an extra query parameter and a lower-case scheme both fall through to FastAPI's route
    slow = api.client.get(f"{path}?rate={rate}&ignored=1", headers={"Authorization": f"bearer {TOKEN}"})
    assert fast.status_code == slow.status_code == 200
    assert fast.content == slow.content
    assert fast.headers["content-type"] == slow.headers["content-type"] == "application/json"


@pytest.mark.parametrize(
    "query,want",
    [
        ("rate=1e400", None),
        ("rate=1000000001", None),
        # within the rate cap, but the demand there is beyond 1,024 cores (models/sanity.py)
        ("rate=1000000000", None),
        ("rate=256500", None),
        ("rate=1E+2", None),  # '+' is a space in a query string (HTML form encoding): "1E 2"
        ("rate=-0", 0.0),
        ("rate=%2B3", 3.0),
        ("rate=%31", 1.0),
    ],
)
def test_fast_path_leaves_edge_cases_to_fastapi(api: Api, query: str, want: float | None) -> None:
    # whatever the fast path does not take is answered as documented by the FastAPI route
    r = api.client.get(f"/v1/models/{LINEAR_KEY}/demand?{query}")
    if want is None:
        assert r.status_code == 422 and r.json()["errors"][0]["field"] == "rate (query)"
    else:
        assert r.status_code == 200 and r.json()["rate"] == want


def test_fast_path_can_be_turned_off(store_dir: Path) -> None:
    on = create_app(ApiSettings(store=store_dir))
    off = create_app(ApiSettings(store=store_dir), fast_path=False)
    with TestClient(on) as a, TestClient(off) as b:
        for rate in (0.0, 3.5, 1234.5):
            ra = a.get(f"/v1/models/{LOW_KEY}/demand", params={"rate": rate})
            rb = b.get(f"/v1/models/{LOW_KEY}/demand", params={"rate": rate})
            assert ra.content == rb.content


def test_serve_cli_refuses_an_fd_that_is_not_a_socket(store_dir: Path, tmp_path: Path) -> None:
    with open(tmp_path / "plain-file", "w") as fh:
        out = subprocess.run(
            [str(RATEFIT), "serve", "--store", str(store_dir), "--fd", str(fh.fileno())],
            capture_output=True,
            text=True,
            timeout=60,
            pass_fds=(fh.fileno(),),
        )
    assert out.returncode == 2 and "--fd" in out.stderr


def test_predict_speaks_table_markdown_and_json_with_a_positional_key(store_dir: Path) -> None:
    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([str(RATEFIT), "predict", *args], capture_output=True, text=True, timeout=60)

    js = json.loads(run(LINEAR_KEY, "--store", str(store_dir), "--rate", "10", "--output", "json").stdout)
    assert set(js) == {"model", "rate", "demand_m", "demand_bound_m", "extrapolated", "version"}
    table = run(LINEAR_KEY, "--store", str(store_dir), "--rate", "10").stdout
    assert "DEMAND BOUND" in table and f"{js['demand_bound_m']}m" in table
    md = run(LINEAR_KEY, "--store", str(store_dir), "--rate", "10", "--output", "markdown").stdout.splitlines()
    assert md[0].startswith("| MODEL |") and md[1].startswith("| --- |") and LINEAR_KEY in md[2]
    old = run("--key", LINEAR_KEY, "--store", str(store_dir), "--rate", "10", "--output", "json")  # hidden alias
    assert json.loads(old.stdout) == js
    bad = run("--store", str(store_dir), "--rate", "10", "--output", "text")
    assert bad.returncode == 2 and "invalid choice: 'text'" in bad.stderr
