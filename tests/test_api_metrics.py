"""``/metrics`` of the sizing API, read with the reference parser
(``prometheus_client.parser.text_string_to_metric_families``) and linted with the
Prometheus project's own linter (``promtool check metrics``).

Facts checked (Prometheus docs, "Exposition formats" and "Metric types"): histogram
buckets are cumulative, the ``le="+Inf"`` bucket equals ``_count``; counters end in
``_total``; and the numbers equal the requests this test made.
"""

from __future__ import annotations

import time

import os
import shutil
import subprocess
from pathlib import Path

import pytest
from api_fixtures import demo_keys, serve_process, write_store
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from ratefit.models.api import ApiSettings, create_app

DEMAND = "/v1/models/{namespace}/{workload}/{container}/demand"


def _families(text: str) -> dict[str, object]:
    return {f.name: f for f in text_string_to_metric_families(text)}


def _value(fams: dict[str, object], family: str, sample: str, **labels: str) -> float:
    fam = fams[family]
    hits = [
        s.value
        for s in fam.samples  # type: ignore[attr-defined]
        if s.name == sample and all(s.labels.get(k) == v for k, v in labels.items())
    ]
    assert len(hits) == 1, (sample, labels, hits)
    return float(hits[0])


def _promtool() -> str | None:
    path = shutil.which("promtool") or ("/usr/bin/promtool" if Path("/usr/bin/promtool").exists() else None)
    if path is None:
        if os.environ.get("RATEFIT_REQUIRE_PROMETHEUS") == "1":
            pytest.fail("promtool is missing but RATEFIT_REQUIRE_PROMETHEUS=1: apt-get install prometheus")
        pytest.skip("promtool not installed (Debian package `prometheus`)")
    return path


def _lint(text: str) -> None:
    promtool = _promtool()
    out = subprocess.run([promtool, "check", "metrics"], input=text, capture_output=True, text=True, timeout=60)
    # promtool prints one line per lint problem and exits non-zero on any
    assert out.returncode == 0 and not out.stdout.strip() and not out.stderr.strip(), out.stdout + out.stderr


@pytest.fixture()
def loaded(tmp_path: Path) -> tuple[TestClient, list[str], Path]:
    store = tmp_path / "store"
    keys = write_store(store, 8, rate_hi=100.0)
    app = create_app(ApiSettings(store=store))
    with TestClient(app) as c:
        yield c, keys, store


def test_counts_and_histograms_follow_the_requests(loaded: tuple[TestClient, list[str], Path]) -> None:
    c, keys, _ = loaded
    for rate in (1, 50, 150):  # 150 is above the trained range [0, 100]: extrapolated
        assert c.get(f"/v1/models/{keys[0]}/demand", params={"rate": rate}).status_code == 200
    assert c.get(f"/v1/models/{keys[0]}/demand", params={"rate": "nan"}).status_code == 422
    assert c.get(f"/v1/models/{keys[0]}/demand", params={"rate": -3}).status_code == 422
    assert c.get("/v1/models/shop/absent/app/demand", params={"rate": 1}).status_code == 404
    items = [{"model": k, "rate": 120.0 if i % 2 else 10.0} for i, k in enumerate(keys)] + [
        {"model": "shop/absent/app", "rate": 1.0}
    ]
    assert c.post("/v1/demand", json={"items": items}).status_code == 200
    assert c.get("/no/such/route").status_code == 404

    fams = _families(c.get("/metrics").text)
    req = "ratefit_api_requests"
    assert _value(fams, req, "ratefit_api_requests_total", route=DEMAND, status="200", method="GET") == 3
    assert _value(fams, req, "ratefit_api_requests_total", route=DEMAND, status="422", method="GET") == 2
    assert _value(fams, req, "ratefit_api_requests_total", route=DEMAND, status="404", method="GET") == 1
    assert _value(fams, req, "ratefit_api_requests_total", route="/v1/demand", status="200", method="POST") == 1
    # the raw path never becomes a label value: unmatched paths share one series
    assert _value(fams, req, "ratefit_api_requests_total", route="<unmatched>", status="404", method="GET") == 1
    assert not any("absent" in s.labels.get("route", "") for s in fams[req].samples)  # type: ignore[attr-defined]

    hist = fams["ratefit_api_request_duration_seconds"]
    assert hist.type == "histogram"  # type: ignore[attr-defined]
    labels = {"route": DEMAND, "status": "200", "method": "GET"}
    count = _value(fams, "ratefit_api_request_duration_seconds", "ratefit_api_request_duration_seconds_count", **labels)
    assert count == 3
    buckets = sorted(
        (float(s.labels["le"]), s.value)
        for s in hist.samples  # type: ignore[attr-defined]
        if s.name.endswith("_bucket") and all(s.labels.get(k) == v for k, v in labels.items())
    )
    values = [v for _, v in buckets]
    assert values == sorted(values), "buckets must be cumulative"
    assert buckets[-1] == (float("inf"), count)

    # lookups: 3 single + 8 batch items with a known key; extrapolated: 1 single + 4 batch
    assert _value(fams, "ratefit_api_lookups", "ratefit_api_lookups_total") == 3 + 8
    assert _value(fams, "ratefit_api_lookups_extrapolated", "ratefit_api_lookups_extrapolated_total") == 1 + 4
    assert _value(fams, "ratefit_api_lookups_unknown_model", "ratefit_api_lookups_unknown_model_total") == 2
    assert _value(fams, "ratefit_api_models_loaded", "ratefit_api_models_loaded") == 8
    assert _value(fams, "ratefit_api_reloads", "ratefit_api_reloads_total", result="ok") == 1  # the startup load
    # issue 10: no store age gauge (derivable in PromQL: time() - ..._store_loaded_timestamp_seconds)
    assert "ratefit_api_store_age_seconds" not in fams
    loaded_at = _value(fams, "ratefit_api_store_loaded_timestamp_seconds", "ratefit_api_store_loaded_timestamp_seconds")
    assert 0 <= time.time() - loaded_at < 600


def test_reload_results_and_refusals_are_counted(loaded: tuple[TestClient, list[str], Path]) -> None:
    c, keys, store = loaded
    bad = store / "shop" / "wl-00000" / "app.json"
    bad.write_text(bad.read_text()[:-40])  # truncated
    assert c.post("/v1/reload").json()["refused"][0]["file"] == "shop/wl-00000/app.json"
    fams = _families(c.get("/metrics").text)
    assert _value(fams, "ratefit_api_reloads", "ratefit_api_reloads_total", result="partial") == 1
    assert _value(fams, "ratefit_api_models_refused", "ratefit_api_models_refused", reason="corrupt") == 1
    assert _value(fams, "ratefit_api_models_refused", "ratefit_api_models_refused", reason="absurd_values") == 0
    # the refused key keeps its last good version, so 8 models still serve
    assert _value(fams, "ratefit_api_models_loaded", "ratefit_api_models_loaded") == 8


def test_each_app_has_its_own_registry(tmp_path: Path) -> None:
    write_store(tmp_path / "s", 2)
    a = create_app(ApiSettings(store=tmp_path / "s"))
    b = create_app(ApiSettings(store=tmp_path / "s"))
    with TestClient(a) as ca, TestClient(b) as cb:
        for _ in range(4):
            ca.get("/healthz")
        fa, fb = _families(ca.get("/metrics").text), _families(cb.get("/metrics").text)
    assert _value(fa, "ratefit_api_requests", "ratefit_api_requests_total", route="/healthz", status="200") == 4
    assert not [s for s in fb["ratefit_api_requests"].samples if s.labels.get("route") == "/healthz"]  # type: ignore[attr-defined]


@pytest.mark.prometheus
def test_promtool_accepts_the_exposition_in_process(loaded: tuple[TestClient, list[str], Path]) -> None:
    c, keys, _ = loaded
    c.get(f"/v1/models/{keys[0]}/demand", params={"rate": 3})
    c.post("/v1/demand", json={"items": [{"model": keys[1], "rate": 2}]})
    r = c.get("/metrics")
    # the text exposition format (0.0.4, or 1.0.0 in newer clients) is served as text/plain
    assert r.headers["content-type"].startswith("text/plain; version=")
    _lint(r.text)


@pytest.mark.prometheus
def test_promtool_accepts_the_exposition_of_a_real_server(tmp_path: Path) -> None:
    _promtool()
    write_store(tmp_path / "store", 3)
    with serve_process(tmp_path / "store", token="metrics-token", workdir=tmp_path) as srv:
        with srv.client() as c:
            c.get(f"/v1/models/{demo_keys(1)[0]}/demand", params={"rate": 3})
            c.get("/v1/models/shop/absent/app/demand", params={"rate": 3})
            text = c.get("/metrics").text
    _lint(text)
    fams = _families(text)
    assert _value(fams, "ratefit_api_models_loaded", "ratefit_api_models_loaded") == 3
