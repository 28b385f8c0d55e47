"""Rate sources of the reconcile loop: the grouped Prometheus query, per-policy queries,
the offline replay, and NoMetrics when Prometheus fails.

References: the real Prometheus server (Debian package) over loopback with the backfilled
INVENTED scenario history; ``numpy.percentile`` (linear interpolation, its default) as the
reference for ``quantile_over_time`` (Prometheus docs: φ-quantile of the values over the
range; linear interpolation between neighbouring ranks — from memory of the implementation).
"""

from __future__ import annotations

import numpy as np
import pytest

from ratefit.controller.metrics_source import (
    NO_METRICS,
    QUERY_FAILED,
    QUERY_REFUSED,
    PrometheusRateSource,
    RateRequest,
    RateTemplate,
    ReplayRateSource,
    grouped_query,
    _groups,
)
from ratefit.controller.promql_guard import QueryGuard
from ratefit.models.prometheus import PrometheusClient
from ratefit.models.scenario import REQUEST_METRIC, SCENARIO

pytestmark = pytest.mark.prometheus

TEMPLATE = RateTemplate(metric=REQUEST_METRIC)  # pods mapped to workloads by their names
LEGACY = RateTemplate(metric=REQUEST_METRIC, workload_label="workload")


def _default_requests(window: str = "1h", percentile: float = 95.0) -> list[RateRequest]:
    return [
        RateRequest(s.namespace, f"size-{s.workload}", s.workload, c.name, rate_window=window, percentile=percentile)
        for s in SCENARIO
        for c in s.containers
    ]


def _as_custom(r: RateRequest) -> RateRequest:
    q = (f'sum by (namespace, workload, pod) (rate({REQUEST_METRIC}{{namespace="{r.namespace}",'
         f'workload="{r.workload}"}}[2m]))')
    return RateRequest(r.namespace, r.policy, r.workload, r.container, query=q,
                       rate_window=r.rate_window, percentile=r.percentile)


def test_grouped_query_text_is_documented_shape():
    reqs = _default_requests()
    # a counter that carries a workload label (the template's workload_label): matched by that label
    q = grouped_query(_groups(reqs), template=LEGACY, step="30s")
    assert q == ('quantile_over_time(0.95, sum by (namespace, workload, pod) '
                 f'(rate({REQUEST_METRIC}{{namespace=~"dispatch|parcels"}}[2m]))[1h:30s])')
    two = grouped_query(_groups(reqs[:2] + _default_requests("30m", 50)[2:4]), template=TEMPLATE, step="30s")
    assert two.count("quantile_over_time(") == 2 and " or " in two and '"ratefit_group", "1"' in two
    # the default: only namespace and pod labels; the pods of the wanted workloads by name
    one = [RateRequest("parcels", "p", "label-printer", "app", workload_kind="StatefulSet")]
    assert grouped_query(_groups(one), template=TEMPLATE, step="30s") == (
        'quantile_over_time(0.95, sum by (namespace, pod) (rate(kestrel_http_requests_total{namespace=~"parcels",'
        'pod=~"^(?:label-printer)-(0|[1-9][0-9]*)$"}[2m]))[1h:30s])')


def test_one_grouped_query_equals_per_policy_queries(scenario_prometheus):
    h = scenario_prometheus
    reqs = _default_requests()
    with PrometheusClient(h.url) as c:
        grouped_src = PrometheusRateSource(c, at=h.end, template=TEMPLATE)
        grouped = grouped_src.per_pod_rates(reqs)
        single_src = PrometheusRateSource(c, at=h.end, template=TEMPLATE)
        single = single_src.per_pod_rates([_as_custom(r) for r in reqs])
    assert grouped_src.queries_sent == 1
    assert single_src.queries_sent == len(reqs)
    assert set(grouped) == set(single) == {r.key for r in reqs}
    for k, g in grouped.items():
        assert not g.missing, g.message
        assert g.pod_rates == pytest.approx(single[k].pod_rates, rel=1e-12)
        assert g.rate == max(g.pod_rates.values())
    # every pod alive at the end of the history is answered, per workload
    svc = {f"{s.namespace}/size-{s.workload}/{s.containers[0].name}": s for s in SCENARIO}
    for k, s in svc.items():
        assert len(grouped[k].pod_rates) == s.replicas
        assert all(p.startswith(s.workload + "-") for p in grouped[k].pod_rates)


def test_mixed_windows_and_percentiles_in_one_query(scenario_prometheus):
    h = scenario_prometheus
    a = _default_requests("1h", 95)[:3]
    b = [RateRequest(r.namespace, r.policy + "-b", r.workload, r.container, rate_window="20m", percentile=50)
         for r in _default_requests()[:3]]
    with PrometheusClient(h.url) as c:
        src = PrometheusRateSource(c, at=h.end, template=TEMPLATE)
        both = src.per_pod_rates(a + b)
        alone_a = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(a)
        alone_b = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(b)
    assert src.queries_sent == 1
    for r in a:
        assert both[r.key].pod_rates == pytest.approx(alone_a[r.key].pod_rates, rel=1e-12)
    for r in b:
        assert both[r.key].pod_rates == pytest.approx(alone_b[r.key].pod_rates, rel=1e-12)
    # the median over 20 minutes is not the p95 over an hour: the groups really differ
    assert both[b[0].key].pod_rates != both[a[0].key].pod_rates


def test_quantile_over_time_equals_numpy_percentile(scenario_prometheus):
    """quantile_over_time(φ, X[W:S]) at t equals numpy.percentile of X sampled at the
    step-aligned times in [t−W, t] (query_range gives those samples)."""
    h = scenario_prometheus
    inner = f'sum by (namespace, workload, pod) (rate({REQUEST_METRIC}{{namespace=~"dispatch|parcels"}}[2m]))'
    reqs = _default_requests("45m", 90)
    with PrometheusClient(h.url) as c:
        got = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(reqs)
        series = c.query_range(inner, start=h.end - 45 * 60, end=h.end, step=30)
    assert len(series) >= 10
    for r in reqs:
        mine = [s for s in series if s.labels["workload"] == r.workload and s.labels["namespace"] == r.namespace]
        expect = {s.labels["pod"]: float(np.percentile(s.values, 90)) for s in mine if len(s)}
        assert got[r.key].pod_rates == pytest.approx(expect, rel=1e-9)


def test_replay_gives_the_numbers_prometheus_gives(scenario_prometheus):
    h = scenario_prometheus
    reqs = _default_requests("1h", 95) + [
        RateRequest(r.namespace, r.policy + "-m", r.workload, r.container, rate_window="10m", percentile=50)
        for r in _default_requests()
    ]
    with PrometheusClient(h.url) as c:
        live = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(reqs)
    replay_src = ReplayRateSource(h.openmetrics, template=TEMPLATE)
    assert replay_src.at == h.end  # defaults to the history's last sample
    replay = replay_src.per_pod_rates(reqs)
    for r in reqs:
        assert not replay[r.key].missing, replay[r.key].message
        assert replay[r.key].pod_rates == pytest.approx(live[r.key].pod_rates, rel=1e-9)
    # at a time in the middle of the history, across the replaced pod's restart
    mid = h.start + 0.55 * (h.end - h.start) + 300
    mid -= mid % 30
    with PrometheusClient(h.url) as c:
        live_mid = PrometheusRateSource(c, at=mid, template=TEMPLATE).per_pod_rates(reqs)
    replay_mid = ReplayRateSource(h.openmetrics, template=TEMPLATE, at=mid).per_pod_rates(reqs)
    for r in reqs:
        assert replay_mid[r.key].pod_rates == pytest.approx(live_mid[r.key].pod_rates, rel=1e-9)
    lp = live_mid["parcels/size-label-printer/app"].pod_rates
    assert len(lp) == 4  # old pod 0 and its replacement both served within the window


def test_unknown_workload_and_bad_custom_query_are_no_metrics(scenario_prometheus):
    h = scenario_prometheus
    reqs = [
        RateRequest("parcels", "ghost", "no-such-workload", "app"),
        RateRequest("parcels", "broken", "label-printer", "app", query="sum(rate(x[5m]"),
        RateRequest("parcels", "empty", "label-printer", "app", query='rate(nothing_here_total{namespace="parcels"}[5m])'),
        RateRequest("parcels", "badwin", "label-printer", "app", rate_window="ten minutes"),
        RateRequest("parcels", "fine", "label-printer", "app"),
    ]
    with PrometheusClient(h.url) as c:
        got = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(reqs)
    assert got["parcels/ghost/app"].why == NO_METRICS and "no-such-workload" in got["parcels/ghost/app"].message
    # not PromQL: refused before anything is sent (issue 9: the error reaches the status message)
    assert got["parcels/broken/app"].why == QUERY_REFUSED and "not valid PromQL" in got["parcels/broken/app"].message
    assert got["parcels/empty/app"].why == NO_METRICS and "no series" in got["parcels/empty/app"].message
    assert got["parcels/badwin/app"].why == NO_METRICS and "rateWindow" in got["parcels/badwin/app"].message
    assert not got["parcels/fine/app"].missing and got["parcels/fine/app"].rate > 0
    # raw queries allowed: Prometheus judges the syntax; its error text is the message (QueryFailed)
    with PrometheusClient(h.url) as c:
        raw = PrometheusRateSource(c, at=h.end, template=TEMPLATE,
                                   guard=QueryGuard(enforce_namespace=False)).per_pod_rates(reqs[1:2])
    assert raw["parcels/broken/app"].why == QUERY_FAILED and "parse error" in raw["parcels/broken/app"].message


def test_prometheus_down_is_no_metrics_for_everyone(closed_port_url):
    reqs = _default_requests() + [_as_custom(_default_requests()[0])]
    with PrometheusClient(closed_port_url, timeout=2) as c:
        got = PrometheusRateSource(c, template=TEMPLATE).per_pod_rates(reqs)
    assert len(got) == len({r.key for r in reqs})
    assert all(r.missing and r.why == NO_METRICS and "cannot reach" in r.message for r in got.values())


@pytest.mark.parametrize(
    ("body", "delay", "text"),
    [
        ("<html>proxy error</html>", 0.0, "not a JSON object"),
        ('{"status":"success","data":{"resultType":"vector","result":[{"metric":{"pod":"a"}}]}}', 0.0, "malformed"),
        ('{"status":"success","data":{"resultType":"vector","result":[]}}', 1.0, "within 0.2s"),
    ],
)
def test_garbage_or_slow_prometheus_is_no_metrics(canned_server, body, delay, text):
    canned_server.set(body=body, delay_s=delay, content_type="text/html" if body.startswith("<") else "application/json")
    with PrometheusClient(canned_server.url, timeout=0.2) as c:
        got = PrometheusRateSource(c, template=TEMPLATE).per_pod_rates(_default_requests())
    assert all(r.why == NO_METRICS and text in r.message for r in got.values())


def test_replay_of_custom_query_or_empty_file_is_no_metrics(tmp_path, scenario_prometheus):
    r = _as_custom(_default_requests()[0])
    got = ReplayRateSource(scenario_prometheus.openmetrics, template=TEMPLATE).per_pod_rates([r])
    assert got[r.key].why == NO_METRICS and "own rateQuery" in got[r.key].message
    empty = tmp_path / "empty.om"
    empty.write_text("# EOF\n")
    got = ReplayRateSource(empty, template=TEMPLATE).per_pod_rates(_default_requests()[:1])
    assert next(iter(got.values())).why == NO_METRICS


def test_namespaces_with_regex_and_dns_characters_do_not_break_the_grouped_query(scenario_prometheus):
    """Namespace names are DNS labels (``-`` allowed); the grouped matcher must stay a valid
    PromQL string and RE2 regex (a ``\\-`` escape is refused by Prometheus' string parser)."""
    h = scenario_prometheus
    odd = [RateRequest("kestrel-west", "p", "label-printer", "app"), RateRequest("a.b", "p", "x", "app")]
    with PrometheusClient(h.url) as c:
        got = PrometheusRateSource(c, at=h.end, template=TEMPLATE).per_pod_rates(_default_requests()[:2] + odd)
    assert not got["parcels/size-label-printer/app"].missing, got["parcels/size-label-printer/app"].message
    for r in odd:
        assert got[r.key].why == NO_METRICS and "no series" in got[r.key].message
    assert 'namespace=~"a\\\\.b|kestrel-west|parcels"' in got[odd[0].key].query
