"""The INVENTED Kestrel Post demo scenario: curve shapes, samples, OpenMetrics history, manifests.

References: the Utilization Law U = X·S + base (Denning & Buzen 1978) for the linear
truth; calculus facts (a convex function has positive second differences, a concave one
negative); the OpenMetrics text format as read by the reference parser
``prometheus_client.openmetrics.parser`` (counters non-decreasing, ``# EOF``); promtool's
backfill accepting the file; the Kubernetes OpenAPI schemas through ``kubernetes-validate``.
"""

from __future__ import annotations

import csv
import time
from collections import defaultdict

import numpy as np
import pytest
import yaml

from ratefit.models.scenario import (
    REQUEST_METRIC,
    SCENARIO,
    Shape,
    default_queries,
    generate_samples,
    manifest_objects,
    simulate,
    write_csv,
    write_manifests,
    write_openmetrics,
)

GRID = np.linspace(1.0, 400.0, 800)
K8S_VERSION = "1.33.0"  # same schema version as tests/test_manifests_deploy.py


def _truths(shape: Shape):
    return [c.truth for s in SCENARIO for c in s.containers if c.truth.shape is shape]


def test_five_services_with_all_shapes_and_unique_keys():
    assert len(SCENARIO) == 5
    assert {c.truth.shape for s in SCENARIO for c in s.containers} == set(Shape)
    keys = [k for s in SCENARIO for k in s.keys()]
    assert len(keys) == len(set(keys)) and all(k.count("/") == 2 for k in keys)
    assert {s.namespace for s in SCENARIO} == {"parcels", "dispatch"}
    assert all(1 <= len(s.containers) <= 2 for s in SCENARIO)
    assert any(s.hpa_on_cpu for s in SCENARIO)


def test_linear_truth_has_constant_slope():
    # Utilization Law: U = X·S (+ base): the slope dU/dX is S everywhere.
    for t in _truths(Shape.LINEAR):
        slope = np.diff(t(GRID)) / np.diff(GRID)
        np.testing.assert_allclose(slope, t.slope, rtol=1e-9)
        assert t(0.0) == pytest.approx(t.base)


def test_convex_and_concave_second_differences():
    for t in _truths(Shape.CONVEX):
        assert np.all(np.diff(t(GRID), 2) > 0)
    for t in _truths(Shape.CONCAVE):
        assert np.all(np.diff(t(GRID), 2) < 0)


def test_step_has_a_jump_at_its_threshold_and_knee_is_flat_below():
    for t in _truths(Shape.STEP):
        eps = 1e-6
        jump = float(t(t.threshold + eps) - t(t.threshold))
        assert jump == pytest.approx(t.jump, rel=1e-3) and t.jump > 0.1
        below = GRID[GRID < t.threshold]
        np.testing.assert_allclose(np.diff(t(below)) / np.diff(below), t.slope, rtol=1e-9)
    for t in _truths(Shape.KNEE):
        below = GRID[GRID <= t.threshold]
        assert np.all(t(below) == t.base)
        above = GRID[GRID > t.threshold + 1]
        np.testing.assert_allclose(np.diff(t(above)) / np.diff(above), t.slope, rtol=1e-9)


@pytest.fixture(scope="module")
def rows():
    return generate_samples(seed=3, hours=24, step_s=60)


def test_samples_are_deterministic_and_cover_every_key(rows):
    again = generate_samples(seed=3, hours=24, step_s=60)
    assert rows == again
    other = generate_samples(seed=4, hours=24, step_s=60)
    assert [r.cpu for r in other[:50]] != [r.cpu for r in rows[:50]]
    assert {r.key for r in rows} == {k for s in SCENARIO for k in s.keys()}
    # one service alone gives the same rows as within the whole scenario
    alone = generate_samples(seed=3, hours=24, step_s=60, services=["dispatch/address-lookup"])
    assert alone == [r for r in rows if r.workload == "address-lookup"]


def test_limits_cap_usage_and_some_samples_are_throttled(rows):
    spec = {f"{s.namespace}/{s.workload}/{c.name}": c for s in SCENARIO for c in s.containers}
    throttled_keys = set()
    for r in rows:
        c = spec[r.key]
        assert r.rate > 0 and r.cpu > 0 and 0.0 <= r.throttled <= 1.0
        if c.limit_m is None:
            assert r.throttled == 0.0
        else:
            assert r.cpu <= c.limit_m / 1000 + 1e-12
            if r.throttled > 0.05:  # the cleaning threshold of DESIGN.md
                throttled_keys.add(r.key)
    assert throttled_keys == {"parcels/route-planner/planner", "dispatch/customs-gateway/gateway"}


def test_pod_variation_and_warm_up():
    tracks = simulate(seed=1, hours=12, step_s=30, services=["parcels/label-printer"])
    assert len(tracks) == 4  # 3 replicas + the replacement of pod 0
    svc = tracks[0].service
    # pods differ a little in CPU per request at the same rate (per-pod base/slope)
    per_pod = [np.polyfit(t.rate, t.cpu["app"], 1)[0] for t in tracks if not t.started_inside]
    assert np.ptp(per_pod) > 0 and np.ptp(per_pod) / np.mean(per_pod) < 0.3
    new = next(t for t in tracks if t.started_inside)
    truth = svc.containers[0].truth
    resid = new.cpu["app"] - truth(new.rate)
    warm = int(svc.warmup_s // 30)
    assert resid[: warm // 2].mean() > resid[warm * 2:].mean() + 0.5 * svc.warmup_cores


def test_csv_files_have_the_agreed_columns(tmp_path):
    paths = write_csv(tmp_path, seed=0, hours=2, step_s=30)
    assert set(paths) == {k for s in SCENARIO for k in s.keys()}
    assert "INVENTED" in (tmp_path / "README.txt").read_text()
    with open(paths["parcels/route-planner/planner"]) as f:
        r = list(csv.reader(f))
    assert r[0] == ["timestamp", "pod", "rate", "cpu", "throttled"]
    assert len(r) - 1 == 2 * (2 * 3600 // 30)  # 2 pods alive at any time × 240 steps (pod 0 replaced once)
    assert all(float(x[2]) > 0 and float(x[3]) > 0 and 0 <= float(x[4]) <= 1 for x in r[1:])
    assert [float(x[0]) for x in r[1:]] == sorted(float(x[0]) for x in r[1:])


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    path = tmp_path_factory.mktemp("om") / "history.om"
    end = 1_767_225_600.0 + 17.0  # not on the step: aligned down
    info = write_openmetrics(path, end=end, hours=3, step_s=30, seed=2)
    return info


def test_openmetrics_parses_counters_monotone_and_match_rows(history):
    from prometheus_client.openmetrics.parser import text_string_to_metric_families

    text = history.path.read_text()
    assert text.endswith("# EOF\n") and "INVENTED" in text
    assert history.end == 1_767_225_600.0
    fams = {f.name: f for f in text_string_to_metric_families(text)}  # raises on malformed text
    assert set(fams) == {REQUEST_METRIC[: -len("_total")], "container_cpu_usage_seconds",
                         "container_cpu_cfs_periods", "container_cpu_cfs_throttled_periods"}
    series = defaultdict(list)
    for f in fams.values():
        assert f.type == "counter"
        for s in f.samples:
            series[(s.name, tuple(sorted(s.labels.items())))].append((float(s.timestamp), s.value))
    assert len(series) == history.series
    for pts in series.values():
        ts = np.array([p[0] for p in pts])
        vs = np.array([p[1] for p in pts])
        assert np.all(np.diff(ts) == 30) and np.all(np.diff(vs) >= 0)
    # increments are the simulated per-step amounts: Δrequests / Δt = the rows' rate
    rows = generate_samples(seed=2, hours=3, step_s=30, end=history.end)
    rate_row = {(r.pod, r.timestamp): r.rate for r in rows}
    cpu_row = {(r.pod, r.container, r.timestamp): r.cpu for r in rows}
    checked = 0
    for (name, labels), pts in series.items():
        lab = dict(labels)
        for (t0, v0), (t1, v1) in zip(pts, pts[1:]):
            if name == REQUEST_METRIC:
                assert (v1 - v0) / 30 == pytest.approx(rate_row[(lab["pod"], t1)], rel=1e-6, abs=1e-6)
            elif name == "container_cpu_usage_seconds_total":
                assert (v1 - v0) / 30 == pytest.approx(cpu_row[(lab["pod"], lab["container"], t1)], rel=1e-5, abs=1e-6)
            checked += 1
    assert checked > 1000
    # cAdvisor exposes CFS series only for containers with a CPU quota (a limit)
    limited = {c.name for s in SCENARIO for c in s.containers if c.limit_m is not None}
    cfs_containers = {dict(l)["container"] for (n, l) in series if n == "container_cpu_cfs_periods_total"}
    assert cfs_containers == limited


@pytest.mark.prometheus
def test_promtool_accepts_the_history(history, tmp_path):
    from prom_fixtures import backfill, require_prometheus

    require_prometheus()
    backfill(history.path, tmp_path / "tsdb")  # raises with promtool's stderr on refusal
    assert any((tmp_path / "tsdb").iterdir())


@pytest.mark.prometheus
def test_default_queries_answer_one_series_per_pod(scenario_prometheus):
    from ratefit.models.prometheus import PrometheusClient

    h = scenario_prometheus
    live = {t.pod for t in simulate(seed=h.seed, hours=h.hours, step_s=h.step_s, end=h.end) if t.timestamps[-1] == h.end}
    with PrometheusClient(h.url) as c:
        for key, q in default_queries().items():
            svc = next(s for s in SCENARIO if key in s.keys())
            for text in (q.rate, q.cpu):
                got = c.query(text, at=h.end)
                assert len(got) == svc.replicas, (key, text)
                assert {s.labels["pod"] for s in got} <= live
                assert all(s.value > 0 for s in got)
            thr = c.query(q.throttle, at=h.end)
            limited = next(cs for cs in svc.containers if key.endswith("/" + cs.name)).limit_m is not None
            assert len(thr) == (svc.replicas if limited else 0)


def test_manifests_validate_against_kubernetes_schemas(tmp_path):
    import kubernetes_validate

    paths = write_manifests(tmp_path)
    kinds = defaultdict(int)
    for p in paths.values():
        text = p.read_text()
        assert text.startswith("# INVENTED")
        for doc in yaml.safe_load_all(text):
            kubernetes_validate.validate(doc, K8S_VERSION, strict=True)
            kinds[doc["kind"]] += 1
    assert kinds == {"Namespace": 2, "Deployment": 4, "StatefulSet": 1, "Service": 1, "HorizontalPodAutoscaler": 1}
    objs = [o for docs in manifest_objects().values() for o in docs]
    for o in objs:
        if o["kind"] in ("Deployment", "StatefulSet"):
            svc = next(s for s in SCENARIO if s.workload == o["metadata"]["name"])
            tmpl = o["spec"]["template"]
            assert o["spec"]["selector"]["matchLabels"].items() <= tmpl["metadata"]["labels"].items()
            for spec, c in zip(svc.containers, tmpl["spec"]["containers"]):
                assert c["name"] == spec.name
                assert c["resources"]["requests"]["cpu"] == f"{spec.request_m}m"
                if spec.limit_m is not None:
                    assert spec.request_m <= spec.limit_m  # request > limit is rejected by the API server
    hpa = next(o for o in objs if o["kind"] == "HorizontalPodAutoscaler")
    assert hpa["spec"]["scaleTargetRef"]["name"] == "tracking-api"
    assert hpa["spec"]["metrics"][0]["resource"]["target"]["type"] == "Utilization"


def test_most_services_over_provisioned_some_under():
    """Today's requests vs the true demand at each service's per-pod peak rate."""
    over, under = [], []
    for s in SCENARIO:
        peak = s.rate_profile.peak / s.replicas
        for c in s.containers:
            need_m = float(c.truth(peak)) * 1000
            (over if c.request_m > 1.3 * need_m else under if c.request_m < need_m else []).append(c.name)
    assert len(over) > len(under) >= 1
