"""The namespace boundary of policies' own PromQL (issue 9 item 3), with the real Prometheus.

A policy in namespace ``shop`` may read only ``shop``'s series through its ``rateQuery``:
every selector needs ``namespace="shop"``; a query answering more series than the cap is
held (TooManySeries), never answered with its largest value; a PromQL error reaches the
result's message (the policy's status), not only the log.

References: PromQL grammar (Prometheus docs "Querying basics": selectors, ``or`` inside
braces is not in 2.42 — it is refused by the real server there), the Prometheus HTTP API
(422/400 with ``error`` text for a query it cannot run).
"""

from __future__ import annotations

import time

import pytest

from ratefit.controller.metrics_source import (
    QUERY_FAILED,
    QUERY_REFUSED,
    TOO_MANY_SERIES,
    PrometheusRateSource,
    RateRequest,
    custom_query,
)
from ratefit.controller.promql_guard import QueryGuard, QueryRefused, check_namespace, selectors
from ratefit.models.prometheus import PrometheusClient

NS = "shop"

ALLOWED = [
    'rate(http_requests_total{namespace="shop"}[2m])',
    'sum by (pod) (rate(http_requests_total{namespace="shop", pod=~"api-.*"}[5m]))',
    'sum by (namespace, pod) (rate(a_total{namespace="shop"}[2m])) / sum by (namespace, pod) (rate(b_total{namespace="shop"}[2m]))',
    'max_over_time(rate(x_total{namespace="shop"}[1m])[10m:1m])',
    'rate(x_total{namespace="shop"}[1m] offset 5m)',
    '{__name__="x_total", namespace="shop"}',
    'label_replace(rate(x_total{namespace="shop"}[1m]), "pod", "$1", "instance", "(.*)")',
    "x_total{namespace='shop'}",
    'x_total{namespace="shop", namespace!="kube-system"}',
    'rate(x_total{namespace="shop"}[1m]) # a comment: other_total',
    'x_total{namespace="shop"} * on() group_left() vector(1)',
]

REFUSED = [
    ('rate(http_requests_total[2m])', "http_requests_total", "no namespace matcher"),
    ('rate(http_requests_total{namespace="bank"}[2m])', 'namespace="bank"', 'is not namespace="shop"'),
    ('rate(x{namespace=~"shop|bank"}[2m])', 'namespace=~"shop|bank"', "is not"),
    ('rate(x{namespace=~"shop"}[2m])', 'namespace=~"shop"', "is not"),  # regexes are refused, even equal-looking
    ('rate(x{namespace!="bank"}[2m])', 'namespace!="bank"', "is not"),
    ('sum(rate(a{namespace="shop"}[2m])) / sum(rate(b[2m]))', "b", "no namespace matcher"),
    ('max_over_time(rate(x{pod="p"}[1m])[10m:1m])', 'x{pod="p"}', "no namespace matcher"),
    ('x{namespace="shop"} or on() y{namespace="bank"}', 'y{namespace="bank"}', "is not"),
    ('{__name__=~".+"}', '{__name__=~".+"}', "no namespace matcher"),
    ('x{namespace="shop" or pod="p"}', "x{", "no namespace matcher"),  # every or-group needs it
    ('info(x{namespace="shop"})', "info", "info()"),
    ("sum(rate(x[5m]", "", "not valid PromQL"),
    ("vector(1)", "", "selects no series"),
]


@pytest.mark.parametrize("q", ALLOWED)
def test_queries_inside_the_namespace_pass(q):
    check_namespace(q, NS)
    check_namespace(custom_query(RateRequest(NS, "p", "w", "c", query=q), step="30s"), NS)


@pytest.mark.parametrize(("q", "selector", "why"), REFUSED)
def test_queries_reaching_outside_are_refused_naming_the_selector(q, selector, why):
    with pytest.raises(QueryRefused) as err:
        check_namespace(q, NS)
    assert why in str(err.value)
    assert selector in err.value.selector
    if selector:
        assert 'add namespace="shop"' in str(err.value) or "info()" in str(err.value)


def test_a_query_cannot_break_out_of_the_controllers_wrapper():
    """Text that closes the wrapper's parenthesis or comments it out is checked in the FULL
    expression sent, so a selector smuggled after it is found (or the whole is not PromQL)."""
    sneaky = [
        'x{namespace="shop"}) or (y',
        'x{namespace="shop"}\n)[1h:30s]) or (secret_total',
        'x{namespace="shop"} #',
    ]
    for q in sneaky:
        full = custom_query(RateRequest(NS, "p", "w", "c", query=q), step="30s")
        try:
            check_namespace(full, NS)
        except QueryRefused:
            continue
        # allowed only when the full text is harmless: every selector in it is shop's
        assert all(any(("namespace", "=", NS) == m for m in g) for _, gs in selectors(full) for g in gs), q


def test_guard_settings():
    with pytest.raises(Exception):
        QueryGuard(max_series=-1)
    QueryGuard(enforce_namespace=False).check("rate(anything[1m])", NS)  # raw queries allowed: no check
    assert QueryGuard(max_series=3).too_many(4) and not QueryGuard(max_series=3).too_many(3)
    assert not QueryGuard(max_series=0).too_many(10**6)  # 0: no cap


def _many_series(path, *, namespaces, pods, end):
    """OpenMetrics: counter x_total for ``pods`` pods in each namespace, rate = 1 + pod index / 100."""
    lines = ["# TYPE x counter"]
    for t in range(0, 1800 + 1, 30):
        for ns in namespaces:
            for i in range(pods):
                lines.append(f'x_total{{namespace="{ns}",pod="p-{i}"}} {(1 + i / 100) * t} {end - 1800 + t}')
    # OpenMetrics wants one metric family's samples together, ordered by time per series
    head, body = lines[0], sorted(lines[1:], key=lambda s: (s.split(" ")[0], float(s.split(" ")[2])))
    path.write_text("\n".join([head, *body, "# EOF", ""]))
    return path


@pytest.mark.prometheus
def test_against_prometheus_boundary_cap_and_errors(tmp_path, prometheus_from_openmetrics):
    end = float(int(time.time()) - 600)
    srv = prometheus_from_openmetrics(_many_series(tmp_path / "x.om", namespaces=("shop", "bank"), pods=12, end=end))
    reqs = {
        "own": RateRequest(NS, "own", "w", "c", query='sum by (pod) (rate(x_total{namespace="shop"}[2m]))', rate_window="10m"),
        "other": RateRequest(NS, "other", "w", "c", query='sum by (pod) (rate(x_total{namespace="bank"}[2m]))', rate_window="10m"),
        "all": RateRequest(NS, "all", "w", "c", query="sum by (namespace, pod) (rate(x_total[2m]))", rate_window="10m"),
        "bad": RateRequest(NS, "bad", "w", "c", query='rate(x_total{namespace="shop"}[2m]) + on(pod) group_left x_total{namespace="shop"} and', rate_window="10m"),
        # valid PromQL, refused by Prometheus when run: many pods on one side of on(namespace)
        "err": RateRequest(NS, "err", "w", "c", rate_window="10m",
                           query='rate(x_total{namespace="shop"}[2m]) * on(namespace) rate(x_total{namespace="shop"}[2m])'),
    }
    with PrometheusClient(srv.url) as c:
        src = PrometheusRateSource(c, at=end, guard=QueryGuard(max_series=10))
        got = src.per_pod_rates(list(reqs.values()))
        raw = PrometheusRateSource(c, at=end, guard=QueryGuard(enforce_namespace=False, max_series=100))
        got_raw = raw.per_pod_rates([reqs["all"]])
    by = {k: got[r.key] for k, r in reqs.items()}
    # the boundary: bank's series never reach shop's policy; nothing was sent for the refused ones
    assert by["other"].why == QUERY_REFUSED and 'x_total{namespace="bank"}' in by["other"].message
    assert by["all"].why == QUERY_REFUSED and "no namespace matcher" in by["all"].message
    # what the policy's status gets: why, and the query as written
    assert by["other"].status_message().endswith('query: sum by (pod) (rate(x_total{namespace="bank"}[2m]))')
    assert len(by["own"].status_message(limit=80)) == 80
    assert by["bad"].why == QUERY_REFUSED
    # the cap: 12 pods > 10 → held, the largest value is not used
    assert by["own"].why == TOO_MANY_SERIES and by["own"].rate is None and "12 series" in by["own"].message
    # a PromQL error from the server reaches the message
    assert by["err"].why == QUERY_FAILED and "Prometheus refused query" in by["err"].message
    assert "duplicate series" in by["err"].message or "many-to-many" in by["err"].message
    assert src.queries_sent == 2  # own and err; the refused ones never left the controller
    # with raw queries allowed (admin's choice) the same query answers all 24 series
    assert not got_raw[reqs["all"].key].missing and len(got_raw[reqs["all"].key].pod_rates) == 12  # pod label repeats
    with PrometheusClient(srv.url) as c:
        ok = PrometheusRateSource(c, at=end, guard=QueryGuard(max_series=12)).per_pod_rates([reqs["own"]])
    assert ok[reqs["own"].key].rate == pytest.approx(1.11, rel=1e-9)  # the busiest pod: 1 + 11/100 req/s


@pytest.mark.prometheus
def test_prometheus_error_text_reaches_the_message(tmp_path, prometheus_from_openmetrics):
    end = float(int(time.time()) - 600)
    srv = prometheus_from_openmetrics(_many_series(tmp_path / "x.om", namespaces=("shop",), pods=2, end=end))
    # parses for our parser (a label_replace with an invalid regex), refused by Prometheus at run time
    q = 'label_replace(rate(x_total{namespace="shop"}[2m]), "pod", "$1", "pod", "(")'
    r = RateRequest(NS, "p", "w", "c", query=q, rate_window="10m")
    with PrometheusClient(srv.url) as c:
        got = PrometheusRateSource(c, at=end).per_pod_rates([r])[r.key]
    assert got.why == QUERY_FAILED
    assert "Prometheus refused query" in got.message and "invalid regular expression" in got.message


@pytest.mark.prometheus
def test_allowed_queries_answer_the_same_without_the_other_namespace(tmp_path, prometheus_from_openmetrics):
    """Differential check against Prometheus itself: every query the guard lets through
    answers exactly the same on a server that also holds another namespace's series (with
    other values and the same pod names) as on a server holding only shop's — so nothing
    of the other namespace reaches the answer, whatever the parser thinks."""
    end = float(int(time.time()) - 600)
    both, only = [], []
    for ns, k in (("shop", 1.0), ("bank", 37.0)):
        for fam in ("x_total", "http_requests_total", "a_total", "b_total"):
            for i in range(3):
                for t in range(0, 1801, 30):
                    row = f'{fam}{{namespace="{ns}",pod="api-{i}",instance="i{i}"}} {k * (1 + i) * t} {end - 1800 + t}'
                    both.append(row)
                    if ns == "shop":
                        only.append(row)

    def write(name, rows):
        rows = sorted(rows, key=lambda s: (s.split(" ")[0].split("{")[0], s.split(" ")[0], float(s.split(" ")[2])))
        out, seen = [], set()
        for r in rows:
            fam = r.split("{")[0].removesuffix("_total")
            if fam not in seen:
                seen.add(fam)
                out.append(f"# TYPE {fam} counter")
            out.append(r)
        (tmp_path / name).write_text("\n".join(out + ["# EOF", ""]))
        return tmp_path / name

    a = prometheus_from_openmetrics(write("both.om", both))
    b = prometheus_from_openmetrics(write("only.om", only))
    with PrometheusClient(a.url) as ca, PrometheusClient(b.url) as cb:
        for q in ALLOWED:
            check_namespace(q, NS)
            ra = sorted((tuple(sorted(s.labels.items())), s.value) for s in ca.query(q, at=end))
            rb = sorted((tuple(sorted(s.labels.items())), s.value) for s in cb.query(q, at=end))
            assert ra == rb, q
            assert ra, q  # and it answers something


from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

POOL = ['namespace="shop"', 'namespace="bank"', 'namespace=~"shop"', 'namespace!="shop"', 'pod="p-1"',
        'job!="x"', 'namespace=""']


@settings(max_examples=300, deadline=None)
@given(sels=st.lists(st.tuples(st.sampled_from(["x_total", "y_total", ""]),
                               st.lists(st.sampled_from(POOL), max_size=4)), min_size=1, max_size=4),
       ops=st.lists(st.sampled_from([" + ", " or ", " / on(pod) ", " and "]), min_size=3, max_size=3),
       wrap=st.sampled_from(["{}", "rate({}[5m])", "sum by (pod) (rate({}[5m]))", "max_over_time({}[10m:1m])"]))
def test_guard_accepts_exactly_the_queries_whose_every_selector_is_shops(sels, ops, wrap):
    parts = []
    for name, ms in sels:
        if not name and not ms:
            ms = ['pod="p-1"']  # a selector needs a name or a matcher
        body = name + "{" + ",".join(ms) + "}"
        parts.append(wrap.format(body) if "[" not in wrap or name or ms else body)
    q = parts[0] + "".join(op + p for op, p in zip(ops, parts[1:]))
    expected = all('namespace="shop"' in ms for _, ms in sels)
    try:
        check_namespace(q, NS)
        accepted = True
    except QueryRefused:
        accepted = False
    assert accepted == expected, q
