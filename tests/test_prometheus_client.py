"""PrometheusClient and fetch_samples against the real Prometheus server (Debian package)
with backfilled history, plus a canned loopback server for broken answers.

Sources: Prometheus HTTP API docs ("Expression queries": envelope, string sample values,
400/422/503 with errorType/error); Prometheus querying docs (``rate``: per-second average
rate of increase of a counter over the range); the 11,000 points per series limit of
query_range (from memory; confirmed below against the real server's refusal).
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import httpx
import numpy as np
import pytest

from ratefit.models.errors import PrometheusError, PrometheusUnavailable, PromQLError
from ratefit.models.prometheus import MAX_POINTS_PER_SERIES, PrometheusClient
from ratefit.models.prometheus_samples import fetch_samples
from ratefit.models.scenario import REQUEST_METRIC, generate_samples, queries

pytestmark = pytest.mark.prometheus

CONST_STEP = 15  # s between samples of the constant-increment counter
CONST_INC = 7.0  # requests added every step
CONST_HOURS = 5


@pytest.fixture
def constant_counter(tmp_path: Path, prometheus_from_openmetrics):
    """A Prometheus holding one counter that grows by CONST_INC every CONST_STEP seconds."""
    end = (int(time.time()) - 600) // CONST_STEP * CONST_STEP
    n = CONST_HOURS * 3600 // CONST_STEP + 1
    lines = ["# HELP ratefit_test_constant test counter with a constant increment", "# TYPE ratefit_test_constant counter"]
    for k in range(n):
        lines.append(f'ratefit_test_constant_total{{pod="p0"}} {1000 + CONST_INC * k} {end - (n - 1 - k) * CONST_STEP}')
    lines.append("# EOF")
    path = tmp_path / "constant.om"
    path.write_text("\n".join(lines) + "\n")
    srv = prometheus_from_openmetrics(path)
    return srv.url, end, end - (n - 1) * CONST_STEP


def _file_series(path: Path, metric: str) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """pod -> (timestamps, values) of a counter, read with the reference parser prometheus_client."""
    from prometheus_client.openmetrics.parser import text_string_to_metric_families

    out: dict[str, tuple[list, list]] = {}
    for fam in text_string_to_metric_families(path.read_text()):
        for s in fam.samples:
            if s.name == metric:
                ts, vs = out.setdefault(s.labels["pod"], ([], []))
                ts.append(float(s.timestamp))
                vs.append(s.value)
    return {p: (np.array(t), np.array(v)) for p, (t, v) in out.items()}


def test_rate_of_constant_counter_is_increment_over_step(constant_counter):
    url, end, _start = constant_counter
    with PrometheusClient(url) as c:
        got = c.query('rate(ratefit_test_constant_total[5m])', at=end)
    # Prometheus docs: rate() = per-second average rate of increase over the range.
    assert len(got) == 1 and got[0].labels == {"pod": "p0"}
    assert got[0].value == pytest.approx(CONST_INC / CONST_STEP, rel=1e-12)
    assert got[0].timestamp == pytest.approx(end)


def test_query_range_limit_and_chunking(constant_counter):
    url, end, start = constant_counter
    q_start = start + 600  # keep the 5m rate window inside the history
    step = 1.0
    n_points = int((end - q_start) / step) + 1
    assert n_points > MAX_POINTS_PER_SERIES
    # The server itself refuses the unchunked range (confirms the 11,000 limit on 2.42).
    r = httpx.post(f"{url}/api/v1/query_range",
                   data={"query": "rate(ratefit_test_constant_total[5m])", "start": q_start, "end": end, "step": step})
    assert r.status_code == 400 and "11,000" in r.json()["error"]
    with PrometheusClient(url) as c:
        series = c.query_range("rate(ratefit_test_constant_total[5m])", start=q_start, end=end, step=step)
    assert len(series) == 1
    s = series[0]
    assert len(s) == n_points  # every point once, none lost or doubled at chunk edges
    assert np.all(np.diff(s.timestamps) == step)
    assert s.timestamps[0] == q_start and s.timestamps[-1] == end
    # rate of a constant-increment counter is increment/step everywhere (Prometheus docs, rate()).
    np.testing.assert_allclose(s.values, CONST_INC / CONST_STEP, rtol=1e-9)


def test_instant_and_range_values_match_the_backfilled_file(scenario_prometheus):
    h = scenario_prometheus
    file_series = _file_series(h.openmetrics, REQUEST_METRIC)
    pod, (ts, vs) = next((p, tv) for p, tv in sorted(file_series.items()) if tv[0][-1] == h.end)
    with PrometheusClient(h.url) as c:
        now = c.query(f'{REQUEST_METRIC}{{pod="{pod}"}}', at=h.end)
        assert [s.value for s in now] == [pytest.approx(vs[-1], abs=1e-6)]
        assert now[0].labels["__name__"] == REQUEST_METRIC and now[0].labels["pod"] == pod
        # raw counter on the sample grid: query_range returns the stored samples themselves
        rng = c.query_range(f'{REQUEST_METRIC}{{pod="{pod}"}}', start=ts[0], end=ts[-1], step=h.step_s)
        assert len(rng) == 1
        np.testing.assert_array_equal(rng[0].timestamps, ts)
        np.testing.assert_allclose(rng[0].values, vs, atol=1e-6)
        # rate over [t-2m, t] with samples on both edges: (v(t) − v(t−2m)) / 120 s, no extrapolation
        rate = c.query(f'rate({REQUEST_METRIC}{{pod="{pod}"}}[2m])', at=h.end)
        assert rate[0].value == pytest.approx((vs[-1] - vs[-5]) / 120.0, rel=1e-9)


def test_scalar_nan_and_inf_values(scenario_prometheus):
    with PrometheusClient(scenario_prometheus.url) as c:
        two = c.query("1 + 1", at=scenario_prometheus.end)
        assert len(two) == 1 and two[0].labels == {} and two[0].value == 2.0
        assert c.query("vector(1) / 0")[0].value == math.inf  # "+Inf" on the wire
        assert math.isnan(c.query("vector(0) / 0")[0].value)  # "NaN" on the wire
        assert c.query('absent_metric_for_ratefit_tests') == []


def test_promql_error_names_the_query(scenario_prometheus):
    with PrometheusClient(scenario_prometheus.url) as c:
        with pytest.raises(PromQLError) as e:
            c.query("sum(rate(foo[5m]")
        assert "sum(rate(foo[5m]" in str(e.value) and "bad_data" in str(e.value)
        with pytest.raises(PromQLError):
            c.query_range("rate(foo[", start=scenario_prometheus.start, end=scenario_prometheus.end, step=60)


def test_fetch_samples_joins_rate_cpu_and_throttle_per_pod(scenario_prometheus):
    """rate(cpu[2m]) at a sample time t is the mean CPU of the 4 steps in (t−2m, t]."""
    h = scenario_prometheus
    key = "parcels/route-planner/planner"  # has a CPU limit and throttled samples
    q = queries(key)
    with PrometheusClient(h.url) as c:
        got = fetch_samples(c, rate_query=q.rate, cpu_query=q.cpu, throttle_query=q.throttle,
                            start=h.end - 3600, end=h.end, step=h.step_s)
    rows = [r for r in generate_samples(seed=h.seed, hours=h.hours, step_s=h.step_s, end=h.end,
                                        services=["parcels/route-planner"]) if r.key == key]
    by_pod: dict[str, dict[float, tuple[float, float]]] = {}
    for r in rows:
        by_pod.setdefault(r.pod, {})[r.timestamp] = (r.rate, r.cpu)
    assert got and {s.pod for s in got} <= set(by_pod)
    checked = 0
    for s in got:
        hist = by_pod[s.pod]
        prev = [hist.get(s.timestamp - k * h.step_s) for k in range(4)]
        if any(p is None for p in prev):
            continue
        assert s.rate == pytest.approx(np.mean([p[0] for p in prev]), rel=1e-6)
        assert s.cpu == pytest.approx(np.mean([p[1] for p in prev]), rel=1e-6)
        assert 0.0 <= s.throttled <= 1.0
        checked += 1
    assert checked > 100
    # the cache-warmer has no CPU limit → no CFS series → throttled reads as 0.0
    q2 = queries("dispatch/tracking-api/api")
    with PrometheusClient(h.url) as c:
        got2 = fetch_samples(c, rate_query=q2.rate, cpu_query=q2.cpu, throttle_query=q2.throttle,
                             start=h.end - 600, end=h.end, step=h.step_s)
    assert got2 and all(s.throttled == 0.0 for s in got2)


def test_server_down_is_unavailable(closed_port_url):
    with PrometheusClient(closed_port_url, timeout=2) as c:
        with pytest.raises(PrometheusUnavailable) as e:
            c.query("up")
        assert closed_port_url in str(e.value)


def test_slow_server_times_out_as_unavailable(canned_server):
    canned_server.set(body='{"status":"success","data":{"resultType":"vector","result":[]}}', delay_s=1.5)
    with PrometheusClient(canned_server.url, timeout=0.3) as c:
        with pytest.raises(PrometheusUnavailable, match="within 0.3s"):
            c.query("up")


@pytest.mark.parametrize("status", [500, 503])
def test_5xx_is_unavailable(canned_server, status):
    canned_server.set(status=status, body='{"status":"error","errorType":"timeout","error":"query timed out"}')
    with PrometheusClient(canned_server.url) as c:
        with pytest.raises(PrometheusUnavailable, match=f"HTTP {status}"):
            c.query("up")


def test_422_is_promql_error(canned_server):
    canned_server.set(status=422, body='{"status":"error","errorType":"execution","error":"many-to-many matching"}')
    with PrometheusClient(canned_server.url) as c:
        with pytest.raises(PromQLError, match="many-to-many"):
            c.query("a / b")


@pytest.mark.parametrize(
    ("body", "content_type", "expect"),
    [
        ("<html>login page</html>", "text/html", "not a JSON object"),
        ('{"status":"error","errorType":"x","error":"nope"}', "application/json", "status 'error'"),
        ('{"status":"success"}', "application/json", "without data.resultType"),
        ('{"status":"success","data":{"resultType":"vector","result":"oops"}}', "application/json", "not a list"),
        ('{"status":"success","data":{"resultType":"vector","result":[{"metric":{}}]}}', "application/json", "malformed"),
        ('{"status":"success","data":{"resultType":"vector","result":[{"metric":{},"value":[1,2.5]}]}}',
         "application/json", "malformed"),  # values must be strings
        ('{"status":"success","data":{"resultType":"streams","result":[]}}', "application/json", "streams"),
        ("[1,2,3]", "application/json", "not a JSON object"),
    ],
)
def test_garbage_is_prometheus_error_saying_what_came(canned_server, body, content_type, expect):
    canned_server.set(body=body, content_type=content_type)
    with PrometheusClient(canned_server.url) as c:
        with pytest.raises(PrometheusError) as e:
            c.query("up")
    assert type(e.value) is PrometheusError  # neither "retry later" nor "fix your query"
    assert expect in str(e.value)


def test_passed_in_client_is_used_and_left_open(canned_server):
    canned_server.set(body='{"status":"success","data":{"resultType":"scalar","result":[1700000000.5,"3.25"]}}')
    http = httpx.Client()
    c = PrometheusClient(canned_server.url + "/", client=http, headers={"Authorization": "Bearer t"})
    got = c.query("3.25", at=1700000000.5)
    assert got[0].value == 3.25 and got[0].timestamp == 1700000000.5
    c.close()
    assert not http.is_closed
    http.close()
    assert canned_server.requests == 1


def test_bad_arguments_are_refused():
    with pytest.raises(PrometheusError, match="http://"):
        PrometheusClient("localhost:9090")
    with PrometheusClient("http://127.0.0.1:9") as c:
        with pytest.raises(PrometheusError, match="step must be positive"):
            c.query_range("up", start=0, end=10, step=0)
        with pytest.raises(PrometheusError, match="before start"):
            c.query_range("up", start=10, end=0, step=1)


def test_wrong_base_path_on_the_real_server_says_give_the_root(scenario_prometheus):
    with PrometheusClient(scenario_prometheus.url + "/api/v1") as c:
        with pytest.raises(PrometheusError, match="root URL") as e:
            c.query("up")
    assert "HTTP 404" in str(e.value)


def test_unauthorised_says_pass_credentials(canned_server):
    canned_server.set(status=401, body="Unauthorized", content_type="text/plain")
    with PrometheusClient(canned_server.url) as c:
        with pytest.raises(PrometheusError, match="credentials"):
            c.query("up")
