"""The rate snapshot (controller/rates_snapshot.py): a pass reads the latest rates from
memory, a refresh loop of its own asks the source; new, changed and too-old requests
are asked at once.

The source is the real replay rate source over constant-rate counters
(tests/reconcile_fixtures.write_history): the per-pod rate of a counter growing by r
per second is r (Prometheus docs, rate(): "per-second average rate of increase").
INVENTED test scenario (namespace ``shop``).
"""

from __future__ import annotations

import os
import time
from dataclasses import replace
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from reconcile_fixtures import running_controller, shared_sizing_api, write_history  # noqa: F401
from ratefit.controller.metrics_source import RateRequest, ReplayRateSource
from ratefit.controller.rates_snapshot import RateSnapshot
from ratefit.models.errors import RatefitError


class Recording:
    """The real replay source, recording what it is asked (and failing on demand)."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.asked: list[list[str]] = []
        self.fail = False
        self.scale = 1.0

    def per_pod_rates(self, requests: Any) -> Any:
        self.asked.append([r.key for r in requests])
        if self.fail:
            raise RatefitError("Prometheus is down (test)")
        got = self.inner.per_pod_rates(requests)
        return {k: replace(v, rate=None if v.rate is None else v.rate * self.scale) for k, v in got.items()}


@pytest.fixture()
def source(tmp_path) -> Recording:
    end = float(int(time.time() - 120))
    path = write_history(tmp_path / "h.om", {("shop", "a"): [40.0, 50.0], ("shop", "b"): [10.0]}, end=end)
    return Recording(ReplayRateSource(path, at=end))


def _req(workload: str, **kw: Any) -> RateRequest:
    return RateRequest(namespace="shop", policy=workload, workload=workload, container="app",
                       workload_kind="Deployment", rate_window="1h", **kw)


def test_a_pass_reads_from_memory_and_the_refresh_asks_the_source(source) -> None:
    clock = [0.0]
    registry = CollectorRegistry()
    snap = RateSnapshot(source, period_s=30.0, monotonic=lambda: clock[0], registry=registry)
    reqs = [_req("a"), _req("b")]
    first = snap.per_pod_rates(reqs)
    assert source.asked == [["shop/a/app", "shop/b/app"]] and snap.asked_now == 2
    # the busiest pod at p95 of a constant rate: 50/s (linear interpolation, Hyndman & Fan type 7)
    assert first["shop/a/app"].rate == pytest.approx(50.0, rel=1e-6)
    assert first["shop/b/app"].rate == pytest.approx(10.0, rel=1e-6)
    clock[0] = 20.0
    second = snap.per_pod_rates(reqs)
    assert len(source.asked) == 1 and snap.hits == 2  # from memory: the source is not asked
    assert second == first
    assert registry.get_sample_value("ratefit_controller_rate_snapshot_age_seconds") == pytest.approx(20.0)
    # the refresh asks everything the last pass wanted; the next pass sees its answers
    source.scale = 2.0
    assert snap.refresh() is True
    assert source.asked[-1] == ["shop/a/app", "shop/b/app"]
    third = snap.per_pod_rates(reqs)
    assert len(source.asked) == 2
    assert third["shop/a/app"].rate == pytest.approx(100.0, rel=1e-6)
    assert snap.age() == 0.0


def test_new_changed_and_too_old_requests_are_asked_at_once(source) -> None:
    clock = [0.0]
    snap = RateSnapshot(source, period_s=30.0, max_age_s=90.0, monotonic=lambda: clock[0])
    snap.per_pod_rates([_req("a")])
    # a new container, and a changed percentile of a known one: only those are asked now
    got = snap.per_pod_rates([_req("a"), _req("b")])
    assert source.asked[-1] == ["shop/b/app"] and set(got) == {"shop/a/app", "shop/b/app"}
    got = snap.per_pod_rates([_req("a", percentile=50.0), _req("b")])
    assert source.asked[-1] == ["shop/a/app"]
    direct = source.inner.per_pod_rates([_req("a", percentile=50.0)])["shop/a/app"]
    assert got["shop/a/app"] == direct  # the answer to the changed request, not the p95 one
    # the refresh fails: the old answers serve until they are older than max_age_s, then asked again
    source.fail = True
    clock[0] = 60.0
    assert snap.refresh() is False and snap.failures == 1
    n = len(source.asked)
    snap.per_pod_rates([_req("a", percentile=50.0), _req("b")])
    assert len(source.asked) == n  # 60 s old: still used
    clock[0] = 91.0
    with pytest.raises(RatefitError):  # too old: asked in the pass, and the pass sees the failure as before
        snap.per_pod_rates([_req("a", percentile=50.0), _req("b")])


def test_the_refresh_thread_runs_at_its_period_and_stops(source) -> None:
    snap = RateSnapshot(source, period_s=0.05)
    snap.per_pod_rates([_req("a")])
    snap.start()
    try:
        deadline = time.monotonic() + 20.0
        while snap.refreshes < 2 and time.monotonic() < deadline:
            time.sleep(0.02)
        assert snap.refreshes >= 2 and snap.last_refresh_s > 0
    finally:
        snap.stop()
    n = snap.refreshes
    time.sleep(0.2)
    assert snap.refreshes == n  # stopped


def test_bad_periods_are_refused(source) -> None:
    with pytest.raises(ValueError, match="positive"):
        RateSnapshot(source, period_s=0)
    with pytest.raises(ValueError, match="at least the period"):
        RateSnapshot(source, period_s=30, max_age_s=10)


def test_ratefit_run_with_a_rate_refresh_period_reads_the_snapshot(tmp_path, shared_sizing_api) -> None:
    """A real `ratefit run --rate-refresh 1s` process: passes run, the refresh thread runs,
    its age and refresh time are on /metrics, SIGTERM stops it with exit 0."""
    import httpx
    from prometheus_client.parser import text_string_to_metric_families

    from reconcile_fixtures import deployment, policy, world

    objects = [deployment("shop", "web", [("app", "1000m", None)]),
               policy("shop", "web", workload="web", mode="DryRun", containers=[{"name": "app", "model": "shop/web/app"}])]
    with world(tmp_path, objects=objects, api_url=shared_sizing_api, rates={("shop", "web"): [50.0]}) as w:
        with running_controller(w, "--interval", "1s", "--rate-refresh", "1s", "--dry-run") as run:
            deadline = time.monotonic() + 60
            url = run.url

            def metrics() -> dict[str, float]:
                text = httpx.get(url + "/metrics", timeout=5).text
                return {s.name: s.value for fam in text_string_to_metric_families(text) for s in fam.samples
                        if not s.labels}

            while metrics().get("ratefit_controller_rate_snapshot_refresh_seconds", 0.0) <= 0.0:
                assert time.monotonic() < deadline, run.log_text()[-2000:]
                time.sleep(0.1)
            got = metrics()
            assert 0.0 <= got["ratefit_controller_rate_snapshot_age_seconds"] <= 3 * 1.0 + 5.0
            assert got.get("ratefit_controller_rate_snapshot_refresh_errors_total", 0.0) == 0.0
            (row,) = w.sizing_policy("shop", "web")["status"]["containers"]
            assert row["verdict"] == "Proposed" and float(row["rate"]) == pytest.approx(50.0, rel=1e-6)
        assert run.code == 0, run.log_text()[-2000:]


def test_a_bad_rate_refresh_is_an_error_naming_the_flag(tmp_path) -> None:
    import subprocess
    import sys
    from pathlib import Path

    ratefit = Path(sys.executable).with_name("ratefit")
    r = subprocess.run([str(ratefit), "run", "--sizing-api", "http://127.0.0.1:1", "--replay", str(tmp_path / "none.om"),
                        "--rate-refresh", "soon"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "--rate-refresh" in r.stderr and "duration" in r.stderr


def test_duration_flags_that_may_be_off() -> None:
    """--rate-refresh (default 30s) and --cache-resync accept 0s/off for "never"."""
    from ratefit.controller.cli import build_parser
    from ratefit.controller.commands.run import duration_or_off
    from ratefit.models.errors import InputError

    for off in ("0", "0s", "off", "never", None):
        assert duration_or_off(off, field="--rate-refresh") == 0.0
    assert duration_or_off("30s", field="--rate-refresh") == 30.0
    assert duration_or_off("1m30s", field="--cache-resync") == 90.0
    with pytest.raises(InputError, match="--cache-resync"):
        duration_or_off("soon", field="--cache-resync")
    ns = build_parser().parse_args(["run", "--sizing-api", "http://127.0.0.1:1", "--prometheus", "http://127.0.0.1:2"])
    assert ns.rate_refresh == (os.environ.get("RATEFIT_RATE_REFRESH") or "30s")
