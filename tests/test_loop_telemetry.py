"""The controller's own /metrics, /healthz, /readyz over real HTTP on loopback.

The exposition is parsed with prometheus_client.parser (the reference parser of the
Prometheus text format) and, when promtool is installed, linted with
`promtool check metrics` (the Prometheus project's own linter)."""

from __future__ import annotations

import shutil
import subprocess

import httpx
from prometheus_client.parser import text_string_to_metric_families

from ratefit.controller.telemetry import HealthServer, Telemetry


def test_metrics_health_and_readiness_over_http() -> None:
    tel = Telemetry()
    tel.passes.labels(outcome="done").inc()
    tel.decisions.labels(verdict="held", reason="NoMetrics").inc(3)
    tel.pass_duration.observe(0.2)
    tel.leader.set(1)
    with HealthServer(tel) as srv:
        assert srv.url.startswith("http://127.0.0.1:")
        r = httpx.get(srv.url + "/readyz")
        assert r.status_code == 503  # not ready before the first pass
        tel.set_ready(True)
        assert httpx.get(srv.url + "/readyz").status_code == 200
        assert httpx.get(srv.url + "/healthz").status_code == 200
        tel.set_liveness(lambda: False)
        assert httpx.get(srv.url + "/healthz").status_code == 503
        assert httpx.get(srv.url + "/nope").status_code == 404
        text = httpx.get(srv.url + "/metrics").text
    fams = {f.name: f for f in text_string_to_metric_families(text)}
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value for f in fams.values() for s in f.samples}
    assert samples[("ratefit_controller_passes_total", (("outcome", "done"),))] == 1.0
    assert samples[("ratefit_controller_decisions_total", (("reason", "NoMetrics"), ("verdict", "held")))] == 3.0
    assert samples[("ratefit_controller_leader", ())] == 1.0
    assert samples[("ratefit_controller_pass_duration_seconds_count", ())] == 1.0
    assert fams["ratefit_controller_pass_duration_seconds"].type == "histogram"
    promtool = shutil.which("promtool")
    if promtool:
        out = subprocess.run([promtool, "check", "metrics"], input=text, capture_output=True, text=True)
        assert out.returncode == 0, out.stdout + out.stderr


def test_two_telemetries_do_not_share_counters() -> None:
    a, b = Telemetry(), Telemetry()
    a.changes.labels(resize_by="Rollout").inc()
    assert a.value("ratefit_controller_changes_total", {"resize_by": "Rollout"}) == 1.0
    assert b.value("ratefit_controller_changes_total", {"resize_by": "Rollout"}) == 0.0
