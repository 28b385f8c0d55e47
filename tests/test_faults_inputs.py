"""Faults of the inputs: Prometheus down, slow or answering garbage → every affected
container held NoMetrics and nothing patched; the sizing API down → NoModel, nothing
patched. Real parts: the sandbox, a real `ratefit serve`, the real Prometheus client
against a closed port or a loopback server with canned bad answers (tests/prom_fixtures).
"""

from __future__ import annotations

import pytest

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, deployment, policy, world
from ratefit.controller.metrics_source import PrometheusRateSource
from ratefit.controller.reconcile import PassOutcome
from ratefit.controller.telemetry import Telemetry
from ratefit.models.prometheus import PrometheusClient

OBJECTS = [
    deployment("shop", "web", [("app", "100m", "200m"), ("side", "100m", None)]),
    policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"},
                                                       {"name": "side", "model": "shop/web/side"}]),
]
RATES = {("shop", "web"): [50.0, 50.0]}


def _assert_untouched(w) -> None:
    assert w.cpu("shop", "web", "app") == ("100m", "200m")
    assert w.cpu("shop", "web", "side") == ("100m", None)
    assert w.patches("shop", "web") == []


@pytest.mark.parametrize("fault", ["down", "slow", "garbage-html", "garbage-json", "error-503"])
def test_prometheus_trouble_holds_everything_with_nometrics(tmp_path, shared_sizing_api, fault, canned_server, closed_port_url) -> None:
    if fault == "down":
        url = closed_port_url
    else:
        url = canned_server.url
        if fault == "slow":
            canned_server.set(body='{"status":"success","data":{"resultType":"vector","result":[]}}', delay_s=2.0)
        elif fault == "garbage-html":
            canned_server.set(body="<html>proxy error</html>", content_type="text/html")
        elif fault == "garbage-json":
            canned_server.set(body='{"status":"success","data":{"resultType":"vector","result":[{"metric":{},"value":"x"}]}}')
        else:
            canned_server.set(status=503, body='{"status":"error","errorType":"timeout","error":"query timed out"}')
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        tel = Telemetry()
        client = PrometheusClient(url, timeout=0.5)
        try:
            rec = w.reconciler(rates=PrometheusRateSource(client), telemetry=tel)
            r = rec.run_pass()
        finally:
            client.close()
        assert r.outcome is PassOutcome.DEGRADED
        assert [(row.verdict, row.why) for row in r.rows] == [("Held", ("NoMetrics",))] * 2
        assert r.patched == ()
        _assert_untouched(w)
        assert tel.value("ratefit_controller_rate_query_errors_total", {"kind": "NoMetrics"}) == 2
        # the status says so (proposals held NoMetrics), so an operator sees why nothing moves
        status = w.sizing_policy("shop", "web")["status"]
        props = status["containers"]
        assert {p["reason"] for p in props} == {"NoMetrics"}
        # every container held for a missing input: Ready is not True (issue 10)
        conds = {c["type"]: c for c in status["conditions"]}
        assert (conds["Ready"]["status"], conds["InputsAvailable"]["reason"]) == ("False", "NoMetrics")


@pytest.mark.parametrize("fault", ["down", "error-500", "garbage"])
def test_sizing_api_trouble_holds_everything_with_nomodel(tmp_path, shared_sizing_api, fault, canned_server, closed_port_url) -> None:
    if fault == "down":
        url = closed_port_url
    elif fault == "error-500":
        url = canned_server.url
        canned_server.set(status=500, body='{"detail":"boom"}')
    else:
        url = canned_server.url
        canned_server.set(body='{"items": "not a list"}')
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        tel = Telemetry()
        rec = w.reconciler(sizing=w.sizing(url, retries=1), telemetry=tel)
        r = rec.run_pass()
        assert [(row.verdict, row.why) for row in r.rows] == [("Held", ("NoModel",))] * 2
        assert r.patched == () and r.outcome is PassOutcome.DEGRADED
        _assert_untouched(w)
        assert sum(tel.value("ratefit_controller_sizing_api_errors_total", {"kind": k})
                   for k in ("SizingApiUnavailable", "SizingApiRejected", "SizingApiError")) == 1


def test_after_the_fault_the_next_pass_converges(tmp_path, shared_sizing_api, closed_port_url) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        rec_down = w.reconciler(sizing=w.sizing(closed_port_url, retries=0))
        assert rec_down.run_pass().patched == ()
        r = w.reconciler().run_pass()  # the API is back
        assert r.patched == ("shop/Deployment/web",)
        assert len(w.patches("shop", "web")) == 1  # both containers in ONE patch: never half a workload
        assert w.cpu("shop", "web", "app")[0] != "100m" and w.cpu("shop", "web", "side")[0] != "100m"
        (ev,) = [e for e in w.events("shop") if e["reason"] == "CpuRequestChanged"
                 and e["regarding"]["kind"] == "Deployment"]  # one Event per workload …
        assert ev["note"].startswith("app: ") and "; side: " in ev["note"]  # … naming each container
        assert ev["regarding"]["kind"] == "Deployment" and ev["regarding"]["name"] == "web"
