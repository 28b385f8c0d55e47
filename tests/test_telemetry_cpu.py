"""The per-container CPU gauges the dashboard plots (requested vs demanded), filled by a
real reconcile pass against the sandbox and the real `ratefit serve`; the exposition
passes `promtool check metrics` (the Prometheus project's linter) when it is installed.

Expected numbers by hand: the shared sizing API's LINEAR curve gives demand
base + slope × rate = 0.05 + 0.004 × 50 = 0.25 cores and the bound 0.25 + 0.02 = 0.27
cores at 50 req/s per pod (tests/reconcile_fixtures.py); the request is the workload's
100m before the pass.
"""

from __future__ import annotations

import shutil
import subprocess

import pytest

from ratefit.controller.telemetry import CpuSample, Telemetry
# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import deployment, policy, shared_sizing_api, world  # noqa: F401

LABELS = {"workload_namespace": "shop", "workload": "Deployment/web", "workload_container": "app"}


def test_a_pass_sets_requested_and_demanded_cpu(tmp_path, shared_sizing_api) -> None:  # noqa: F811
    objects = [deployment("shop", "web", [("app", "100m", "200m")]),
               policy("shop", "web", workload="web", mode="DryRun",
                      containers=[{"name": "app", "model": "shop/web/app"}])]
    tel = Telemetry()
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        w.reconciler(telemetry=tel).run_pass()
    assert tel.value("ratefit_controller_cpu_request_cores", LABELS) == pytest.approx(0.1)
    assert tel.value("ratefit_controller_cpu_demand_cores", LABELS) == pytest.approx(0.25, abs=0.001)
    assert tel.value("ratefit_controller_cpu_demand_bound_cores", LABELS) == pytest.approx(0.27, abs=0.001)
    text = tel.render().decode()
    if shutil.which("promtool"):
        out = subprocess.run(["promtool", "check", "metrics"], input=text, capture_output=True, text=True)
        assert out.returncode == 0, out.stdout + out.stderr


def test_snapshot_replaces_the_previous_one() -> None:
    tel = Telemetry()
    tel.set_cpu([CpuSample("shop", "Deployment/web", "app", 100, 250, 270),
                 CpuSample("shop", "Deployment/web", "side", 50, None, None)])
    side = {**LABELS, "workload_container": "side"}
    assert tel.value("ratefit_controller_cpu_request_cores", side) == 0.05
    assert tel.registry.get_sample_value("ratefit_controller_cpu_demand_cores", side) is None  # unknown: no sample
    tel.set_cpu([CpuSample("shop", "Deployment/web", "app", 300, 250, 270)])
    assert tel.registry.get_sample_value("ratefit_controller_cpu_request_cores", side) is None  # gone
    assert tel.value("ratefit_controller_cpu_request_cores", LABELS) == 0.3
