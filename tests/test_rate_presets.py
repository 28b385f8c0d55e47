"""Rate presets and the derived cAdvisor queries against the real Prometheus, with history
backfilled in each counter convention for workloads whose names could fool a pattern.

INVENTED data (Kestrel Post naming, the ``shop`` namespace): every counter grows at a
constant rate per pod, so the expected per-pod rate is that slope exactly — ``rate()`` is the
per-second increase of a counter (Prometheus docs, "Functions: rate"), and its extrapolation
is exact for a straight line sampled evenly; ``quantile_over_time`` of a constant is that
constant. cAdvisor series carry namespace/pod/container, plus a pod-level ``container=""``
series and a sandbox ``container="POD"`` series that must not be counted (DESIGN.md facts).
"""

from __future__ import annotations

import re
import time
from pathlib import Path

import pytest

from ratefit.controller.metrics_source import PrometheusRateSource, RateRequest, RateTemplate
from ratefit.controller.rate_presets import DEFAULT_PRESET, PRESETS, preset, preset_table, template_for
from ratefit.controller.workload_queries import container_queries, cpu_query, throttle_query
from ratefit.models.errors import InputError
from ratefit.models.prometheus import PrometheusClient

NS = "shop"
#: (kind, workload) → pods; names with dashes and digits that could fool a pattern
WORKLOADS = {
    ("Deployment", "api"): ["api-7d9f8b6c5d-x2k9p", "api-7d9f8b6c5d-b4zqr"],
    ("Deployment", "api-v2"): ["api-v2-5f6c7d8b9-q2w4r"],
    ("Deployment", "web"): ["web-6b7c8d9f5-kq2zx"],
    ("Deployment", "web-12345"): ["web-12345-6b7c8d9f5-vv2cx", "web-12345-6b7c8d9f5-hh4tn"],
    ("StatefulSet", "db"): ["db-0", "db-1"],
    ("StatefulSet", "db-1"): ["db-1-0", "db-1-1", "db-1-2"],
}
POD_RATE = {p: 1.0 + i * 0.5 for i, p in enumerate(p for pods in WORKLOADS.values() for p in pods)}
#: the same pod names in another namespace, at 100 req/s: must never be counted for shop
OTHER_NS = "bank"
HISTORY_S, STEP_S = 1800, 15


def _series(lines: dict[str, list[str]], family: str, labels: str, slope: float, start: float) -> None:
    lines.setdefault(family, [])
    for k in range(HISTORY_S // STEP_S + 1):
        t = start + k * STEP_S
        lines[family].append(f"{family}{{{labels}}} {slope * k * STEP_S:.6f} {t:.0f}")


def write_history(path: Path, end: float) -> Path:
    start = end - HISTORY_S
    fam: dict[str, list[str]] = {}
    for pods in WORKLOADS.values():
        for pod in pods:
            r = POD_RATE[pod]
            _series(fam, "http_requests_total", f'namespace="{NS}",pod="{pod}"', r, start)
            _series(fam, "http_requests_total", f'namespace="{OTHER_NS}",pod="{pod}"', 100.0, start)
            # OpenTelemetry: two routes per pod; the pod's rate is their sum
            _series(fam, "http_server_request_duration_seconds_count",
                    f'http_route="/a",namespace="{NS}",pod="{pod}"', 2 * r, start)
            _series(fam, "http_server_request_duration_seconds_count",
                    f'http_route="/b",namespace="{NS}",pod="{pod}"', r, start)
            # a mesh counter, reported by both ends: only the receiving side counts
            _series(fam, "istio_requests_total", f'namespace="{NS}",pod="{pod}",reporter="destination"', 4 * r, start)
            _series(fam, "istio_requests_total", f'namespace="{NS}",pod="{pod}",reporter="source"', 50.0, start)
            # older annotation-scrape labels
            _series(fam, "http_requests_total", f'kubernetes_namespace="{NS}",kubernetes_pod_name="{pod}"', 5 * r, start)
            # a counter with its own workload label
            wl = next(n for (_, n), ps in WORKLOADS.items() if pod in ps)
            _series(fam, "kestrel_labelled_requests_total", f'namespace="{NS}",pod="{pod}",workload="{wl}"', 6 * r, start)
            # cAdvisor: the container, the pod-level sum and the sandbox
            _series(fam, "container_cpu_usage_seconds_total", f'container="app",namespace="{NS}",pod="{pod}"', 0.01 * r, start)
            _series(fam, "container_cpu_usage_seconds_total", f'container="",namespace="{NS}",pod="{pod}"', 9.0, start)
            _series(fam, "container_cpu_usage_seconds_total", f'container="POD",namespace="{NS}",pod="{pod}"', 7.0, start)
            _series(fam, "container_cpu_cfs_periods_total", f'container="app",namespace="{NS}",pod="{pod}"', 10.0, start)
            _series(fam, "container_cpu_cfs_throttled_periods_total", f'container="app",namespace="{NS}",pod="{pod}"',
                    0.1 * r, start)
    out = []
    for name, rows in fam.items():
        out.append(f"# TYPE {name.removesuffix('_total').removesuffix('_count') if name.endswith('_total') else name} "
                   f"{'counter' if name.endswith('_total') else 'unknown'}")
        # one family's samples together; per series in time order
        out += sorted(rows, key=lambda s: (s.rsplit(" ", 2)[0], float(s.rsplit(" ", 1)[1])))
    out.append("# EOF")
    path.write_text("\n".join(out) + "\n")
    return path


@pytest.fixture(scope="module")
def conventions(tmp_path_factory):
    from prom_fixtures import backfill, run_prometheus

    base = tmp_path_factory.mktemp("presets")
    end = float(int(time.time()) - 600)
    end -= end % STEP_S
    backfill(write_history(base / "history.om", end), base / "tsdb")
    with run_prometheus(base / "tsdb") as srv:
        yield srv.url, end


#: preset → the factor its counter carries over the pod's rate in the history above
FACTOR = {"http-requests-total": 1.0, "otel-http-server": 3.0, "istio-requests-total": 4.0,
          "annotation-pods": 5.0, "workload-label": 6.0}


def _requests(window: str = "20m") -> list[RateRequest]:
    return [RateRequest(NS, f"size-{name}", name, "app", rate_window=window, workload_kind=kind)
            for (kind, name) in WORKLOADS]


@pytest.mark.prometheus
@pytest.mark.parametrize("name", list(PRESETS))
def test_each_preset_gives_each_workload_exactly_its_pods(conventions, name):
    url, end = conventions
    tpl = template_for(name, metric="kestrel_labelled_requests_total" if name == "workload-label" else None)
    with PrometheusClient(url) as c:
        src = PrometheusRateSource(c, at=end, template=tpl)
        got = src.per_pod_rates(_requests())
        assert src.queries_sent == 1  # one grouped query for every workload
        for (kind, wl), pods in WORKLOADS.items():
            res = got[f"{NS}/size-{wl}/app"]
            assert not res.missing, res.message
            assert res.pod_rates == pytest.approx({p: FACTOR[name] * POD_RATE[p] for p in pods}, rel=1e-9), (name, wl)
            # the per-workload query (training, `ratefit check`) answers the same pods
            one = c.query(tpl.for_workload(NS, kind, wl), at=end)
            assert {s.labels[tpl.pod_label] for s in one} == set(pods)


@pytest.mark.prometheus
def test_kind_unknown_still_splits_tricky_names(conventions):
    url, end = conventions
    reqs = [RateRequest(NS, f"size-{n}", n, "app", rate_window="20m") for (_, n) in WORKLOADS]  # no kind
    with PrometheusClient(url) as c:
        got = PrometheusRateSource(c, at=end).per_pod_rates(reqs)
    for (_, wl), pods in WORKLOADS.items():
        assert set(got[f"{NS}/size-{wl}/app"].pod_rates) == set(pods), wl


@pytest.mark.prometheus
def test_cadvisor_queries_count_only_the_container(conventions):
    url, end = conventions
    with PrometheusClient(url) as c:
        for (kind, wl), pods in WORKLOADS.items():
            q = container_queries(NS, kind, wl, "app")
            cpu = {s.labels["pod"]: s.value for s in c.query(q.cpu, at=end)}
            thr = {s.labels["pod"]: s.value for s in c.query(q.throttle, at=end)}
            rate = {s.labels["pod"]: s.value for s in c.query(q.rate, at=end)}
            assert cpu == pytest.approx({p: 0.01 * POD_RATE[p] for p in pods}, rel=1e-9)
            assert thr == pytest.approx({p: 0.01 * POD_RATE[p] for p in pods}, rel=1e-9)  # 0.1 r / 10 periods
            assert rate == pytest.approx({p: POD_RATE[p] for p in pods}, rel=1e-9)
            # the annotation labels are renamed to namespace/pod, so training joins pod by pod
            qa = container_queries(NS, kind, wl, "app", template=preset("annotation-pods").template)
            got = c.query(qa.rate, at=end)
            assert {s.labels["pod"] for s in got} == set(pods) and all(s.labels["namespace"] == NS for s in got)


def test_query_texts_are_the_documented_ones():
    assert cpu_query("shop", "StatefulSet", "db-1", "app") == (
        'sum by (namespace, pod) (rate(container_cpu_usage_seconds_total{namespace="shop",'
        'pod=~"^db-1-(0|[1-9][0-9]*)$",container="app"}[2m]))')
    assert throttle_query("shop", "StatefulSet", "db", "app", interval="5m").count("[5m]") == 2
    assert preset("istio-requests-total").template.for_workload("shop", "StatefulSet", "db") == (
        'sum by (namespace, pod) (rate(istio_requests_total{namespace="shop",pod=~"^db-(0|[1-9][0-9]*)$",'
        'reporter="destination"}[2m]))')
    with pytest.raises(InputError, match="http-requests-total"):
        preset("nginx")
    with pytest.raises(ValueError):
        cpu_query("shop", "Deployment", "api", "")  # the pod-level series is never a container
    with pytest.raises(InputError):
        RateTemplate(metric='x"}) or vector(1')
    assert template_for(None).metric == PRESETS[DEFAULT_PRESET].template.metric


def test_env_picks_the_preset(monkeypatch):
    monkeypatch.setenv("RATEFIT_RATE_PRESET", "otel-http-server")
    assert template_for().metric == "http_server_request_duration_seconds_count"
    assert template_for(metric="orders_total").metric == "orders_total"
    assert template_for("http-requests-total", interval="5m").interval == "5m"


def test_readme_table_is_the_generated_one():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert preset_table(markdown=True) in readme
    for p in PRESETS.values():
        q = p.template.for_workload("shop", "Deployment", "api")
        assert re.search(re.escape(q.replace("|", "\\|")), readme), p.name


def test_queries_for_policy_keeps_the_namespace_boundary():
    from ratefit.controller.policy import parse_policy
    from ratefit.controller.promql_guard import QueryRefused
    from ratefit.controller.workload_queries import queries_for_policy

    def pol(rate_query=None):
        c = {"name": "app", "model": "shop/db-1/app"}
        if rate_query:
            c["rateQuery"] = rate_query
        return parse_policy({"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
                             "metadata": {"name": "db-1", "namespace": "shop"},
                             "spec": {"workload": {"kind": "StatefulSet", "name": "db-1"}, "containers": [c]}})

    [one] = queries_for_policy(pol())
    assert one.model == "shop/db-1/app" and one.queries.cpu == cpu_query("shop", "StatefulSet", "db-1", "app")
    assert 'pod=~"^db-1-(0|[1-9][0-9]*)$"' in one.queries.rate
    own = 'sum by (namespace, pod) (rate(orders_total{namespace="shop"}[2m]))'
    assert queries_for_policy(pol(own))[0].queries.rate == own
    with pytest.raises(QueryRefused, match="bank"):
        queries_for_policy(pol('sum by (pod) (rate(orders_total{namespace="bank"}[2m]))'))
