"""Two controllers against one sandbox → one Lease holder, one set of changes; SIGTERM
mid-pass → clean exit (the workload in flight finished or untouched, the rest left
alone) and the Lease released. Real `ratefit run` processes, the real Lease lock
(controller/kube_lease.py) on coordination.k8s.io/v1 through the sandbox.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
from prometheus_client.parser import text_string_to_metric_families

from api_fixtures import free_port
# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, deployment, policy, world
from ratefit.controller.quantity import parse_cpu

RATEFIT = Path(sys.executable).with_name("ratefit")
RATES = {("shop", "a"): [50.0], ("shop", "b"): [50.0]}
LEASE = "/apis/coordination.k8s.io/v1/namespaces/default/leases/ratefit-controller"


def _objects():
    return [o for n in ("a", "b") for o in (
        deployment("shop", n, [("app", "100m", "200m")]),
        policy("shop", n, workload=n, containers=[{"name": "app", "model": f"shop/{n}/app"}]))]


def start_controller(w, identity: str, port: int, *extra: str) -> subprocess.Popen[str]:
    cmd = [str(RATEFIT), "run", "--kubeconfig", str(w.kubeconfig), "--replay", str(w.history),
           "--rate-at", str(w.at), "--sizing-api", w.api_url, "--interval", "1s", "--identity", identity,
           "--lease-namespace", "default", "--metrics-port", str(port), "--budget-per-minute", "0",
           "--max-rollouts", "0", *extra]
    env = {k: v for k, v in os.environ.items() if k != "RATEFIT_CRASH_AT"}
    log = open(w.tmp / f"{identity}.log", "w")
    return subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, text=True, env=env)


def _stop(proc: subprocess.Popen[str], timeout: float = 20.0) -> int:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)
    return proc.returncode


def _metrics(port: int) -> dict[str, float]:
    text = httpx.get(f"http://127.0.0.1:{port}/metrics", timeout=5).text
    out: dict[str, float] = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[s.name] = out.get(s.name, 0.0) + s.value
    return out


def _wait(cond, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}")


def test_two_controllers_one_holder_one_set_of_changes(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects(), api_url=shared_sizing_api, rates=RATES) as w:
        ports = (free_port(), free_port())
        procs = [start_controller(w, "ctl-one", ports[0]), start_controller(w, "ctl-two", ports[1])]
        try:
            _wait(lambda: all(parse_cpu(w.cpu("shop", n, "app")[0]) == 315 for n in ("a", "b")), 60, "both workloads sized")
            holder = w.get(LEASE)["spec"]["holderIdentity"]
            assert holder in ("ctl-one", "ctl-two")
            lead, standby = (ports[0], ports[1]) if holder == "ctl-one" else (ports[1], ports[0])
            _wait(lambda: _metrics(lead).get("ratefit_controller_passes_total", 0) >= 3, 30, "three passes by the leader")
            m_standby = _metrics(standby)
            assert m_standby.get("ratefit_controller_leader", 0) == 0
            assert m_standby.get("ratefit_controller_passes_total", 0) == 0  # the standby never ran a pass
            assert _metrics(lead)["ratefit_controller_leader"] == 1
            assert httpx.get(f"http://127.0.0.1:{standby}/readyz", timeout=5).status_code == 200
            assert httpx.get(f"http://127.0.0.1:{standby}/healthz", timeout=5).status_code == 200
            assert len(w.patches("shop", "a")) == 1 and len(w.patches("shop", "b")) == 1
            instances = {e.get("reportingInstance") for e in w.events("shop")}
            assert instances == {holder}  # every Event came from the Lease holder
        finally:
            codes = [_stop(p) for p in procs]
        assert codes == [0, 0]
        assert not w.get(LEASE)["spec"].get("holderIdentity")  # released on SIGTERM


def test_sigterm_mid_pass_exits_cleanly_and_releases_the_lease(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects(), api_url=shared_sizing_api, rates=RATES) as w:
        # slow down the first PATCH of workload a (its server-side dry run) so SIGTERM lands mid-pass
        w.sandbox.faults.add("PATCH", r"/deployments/a$", latency=3.0, count=1)
        port = free_port()
        proc = start_controller(w, "ctl-term", port)
        try:
            _wait(lambda: any(r["method"] == "PATCH" and r["path"].endswith("/deployments/a")
                              for r in list(w.sandbox.requests)), 60, "the first patch of workload a")
            proc.send_signal(signal.SIGTERM)
            code = proc.wait(timeout=30)
        finally:
            _stop(proc)
        assert code == 0, (w.tmp / "ctl-term.log").read_text()[-2000:]
        a, b = parse_cpu(w.cpu("shop", "a", "app")[0]), parse_cpu(w.cpu("shop", "b", "app")[0])
        assert a in (100, 315)  # the workload in flight is finished or untouched, never half
        assert b == 100  # the rest of the pass was abandoned
        assert len(w.patches("shop", "b")) == 0
        assert not w.get(LEASE)["spec"].get("holderIdentity")
        assert "stopping" in (w.tmp / "ctl-term.log").read_text()
