"""`ratefit serve --metrics-port`: a second listener that serves only /metrics and /healthz,
so Prometheus can scrape a sizing API that binds loopback (controller/metrics_listener.py).

Checked with a real `ratefit serve` subprocess: the listener needs no token while every API
route on the API's own port does; it answers the same registry (the counts follow the
requests made on the API port), read with the reference parser
(prometheus_client.parser, Prometheus docs "Exposition formats") and linted with
`promtool check metrics`; it serves no model and no demand.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from api_fixtures import serve_process, write_store
from test_api_metrics import _families, _lint, _value

RATEFIT = Path(sys.executable).with_name("ratefit")
DEMAND = "/v1/models/{namespace}/{workload}/{container}/demand"


def _metrics_url(server, timeout: float = 30.0) -> str:
    """The listener's address, from the server's JSON-lines log ('metrics on URL/metrics')."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for line in server.log_text().splitlines():
            try:
                msg = json.loads(line).get("message", "")
            except ValueError:
                continue
            if msg.startswith("metrics on "):
                return msg.removeprefix("metrics on ")
        time.sleep(0.1)
    raise AssertionError(f"no 'metrics on' line in the log:\n{server.log_text()[-2000:]}")


def test_metrics_port_serves_the_api_registry_without_a_token_and_nothing_else(tmp_path: Path) -> None:
    keys = write_store(tmp_path / "store", 3, rate_hi=100.0)
    with serve_process(tmp_path / "store", token="s3cret-token", workdir=tmp_path,
                       extra_args=["--metrics-port", "0"]) as api:
        url = _metrics_url(api)
        assert url.startswith("http://127.0.0.1:") and url.endswith("/metrics")
        base = url.removesuffix("/metrics")
        # the API's own routes still need the token
        assert httpx.get(f"{api.base_url}/metrics", timeout=10).status_code == 401
        with api.client() as c:
            for rate in (1, 50):
                assert c.get(f"/v1/models/{keys[0]}/demand", params={"rate": rate}).status_code == 200
        got = httpx.get(url, timeout=10)
        assert got.status_code == 200 and got.headers["content-type"].startswith("text/plain")
        fams = _families(got.text)
        assert _value(fams, "ratefit_api_models_loaded", "ratefit_api_models_loaded") == 3
        assert _value(fams, "ratefit_api_requests", "ratefit_api_requests_total",
                      route=DEMAND, status="200", method="GET") == 2
        _lint(got.text)
        assert httpx.get(f"{base}/healthz", timeout=10).status_code == 200
        # no model, no demand, no reload on this port
        for path in (f"/v1/models/{keys[0]}/demand?rate=1", "/v1/models", "/readyz"):
            assert httpx.get(base + path, timeout=10).status_code == 404, path
        assert httpx.post(f"{base}/v1/reload", timeout=10).status_code in (404, 501)


def test_a_bad_metrics_port_is_one_line(tmp_path: Path) -> None:
    write_store(tmp_path / "store", 1)
    p = subprocess.run([str(RATEFIT), "serve", "--store", str(tmp_path / "store"), "--port", "0",
                        "--metrics-port", "70000"], capture_output=True, text=True, timeout=60)
    assert p.returncode != 0
    assert "--metrics-port 70000: must be between 0 and 65535" in p.stderr
    assert "Traceback" not in p.stderr
