"""`ratefit replay`: packing, the figures, no look-ahead, and the decisions against `ratefit plan`.

References:
- first-fit decreasing bin packing (Johnson 1973; Garey & Johnson, "Computers and
  Intractability", 1979): items largest first, each into the first bin it fits — worked
  by hand below;
- quantiles: numpy's default 'linear' method = Hyndman & Fan (1996) type 7 (the fixed
  strategy's 0.95 quantile is worked by hand below);
- Prometheus (the real server) for the rates `ratefit plan` reads, the sandbox API server
  for the cluster — the replay's decisions must be what `plan` decides at the same time.

The scenario data is the INVENTED Kestrel Post demo scenario (models/scenario).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from ratefit.controller.replay import History, StoreSizer, read_openmetrics, run_replay, targets_from_objects, to_json
from ratefit.controller.replay.engine import ReplayOptions
from ratefit.controller.replay.outcome import Outcome, container_figures
from ratefit.controller.replay.packing import first_fit_decreasing
from ratefit.controller.replay.series import pod_usage
from ratefit.controller.replay.simulate import BudgetConfig
from ratefit.models.curve import DemandCurve
from ratefit.models.scenario import SCENARIO, manifest_objects, write_openmetrics
from ratefit.models.scenario.manifests import default_policies
from ratefit.models.scenario.services import REQUEST_METRIC
from ratefit.models.store import Artifact, CurveData, CVRow, DataWindow, ModelStore

RATEFIT = Path(sys.executable).with_name("ratefit")
BAND = 0.02  # cores: the upper band of every truth curve in the test store
END = 1_767_225_600.0  # 2026-01-01T00:00:00Z


# ---------------------------------------------------------------- packing


def test_first_fit_decreasing_matches_the_hand_worked_example() -> None:
    # Nodes of 1000m; pods 500, 700, 200, 300, 400, 100, 600 m. Sorted largest first:
    #   700 → node 1 (300 left)      600 → node 2 (400 left)     500 → node 3 (500 left)
    #   400 → node 1? 300 < 400; node 2: fits (0 left)
    #   300 → node 1: fits (0 left)  200 → nodes 1, 2 full; node 3 (300 left)
    #   100 → node 3 (200 left)
    # 3 nodes holding 1000, 1000, 800 m (and 3 = ⌈2800/1000⌉, the lower bound: optimal here).
    p = first_fit_decreasing([500, 700, 200, 300, 400, 100, 600], 1000)
    assert (p.nodes, p.loads, p.oversized) == (3, (1000, 1000, 800), 0)
    # first fit, not best fit: 6 and 5 on nodes of 10, then 4 goes to the FIRST node with room
    # (node 1, 4 left → 0), not to the fullest one; then 5 fits node 2 exactly
    assert first_fit_decreasing([4, 6, 5, 5], 10).loads == (10, 10)
    # a pod larger than a node needs a node of its own and is reported
    big = first_fit_decreasing([1200, 300, 300], 1000)
    assert (big.nodes, big.oversized) == (2, 1)
    assert first_fit_decreasing([], 1000).nodes == 0


# ---------------------------------------------------------------- the figures by hand


def test_cpu_hours_and_under_share_match_a_hand_computation() -> None:
    """Two pods, one container, CPU counters sampled at t0 … t0+180 s: three minutes each.

    pod a: counter 0, 30, 90, 120 s → usage 0.5, 1.0, 0.5 cores
    pod b: counter 0, 12, 24, 60 s  → usage 0.2, 0.2, 0.6 cores
    current request 600m; ratefit lowers it to 400m effective at t0+60 (the second minute).
    fixed = 0.95 quantile of (0.2, 0.2, 0.5, 0.5, 0.6, 1.0), type 7: h = 5 × 0.95 = 4.75 →
            0.6 + 0.75 × (1.0 − 0.6) = 0.9 cores.
    cpu-hours (each minute is 1/60 h): usage 3.0/60 = 0.05; current 6 × 0.6/60 = 0.06;
            fixed 6 × 0.9/60 = 0.09; ratefit (0.6 + 0.4 + 0.4) × 2 / 60 = 0.046667.
    under (usage > request): current: a's 1.0 → 1/6; fixed: a's 1.0 → 1/6;
            ratefit: a 1.0 > 0.4, a 0.5 > 0.4, b 0.6 > 0.4 → 3/6 (b's 0.6 vs 0.6 is not over).
    """
    t0 = 1_000_020.0  # a whole minute
    ts = t0 + np.array([0.0, 60.0, 120.0, 180.0])
    minutes = t0 + 60.0 * np.arange(1, 4)
    a = pod_usage([(ts, np.array([0.0, 30.0, 90.0, 120.0]))], minutes)
    b = pod_usage([(ts, np.array([0.0, 12.0, 24.0, 60.0]))], minutes)
    np.testing.assert_allclose(a.cores, [0.5, 1.0, 0.5], rtol=1e-6)
    np.testing.assert_allclose(b.cores, [0.2, 0.2, 0.6], rtol=1e-6)
    f = container_figures("ns/Deployment/w", "c", [a, b], minutes, [(t0, 600), (t0 + 60.0, 400)])
    assert f.fixed_m == pytest.approx(900.0, rel=1e-6)
    assert f.cpu_hours["usage"] == pytest.approx(0.05, rel=1e-6)
    assert f.cpu_hours["current"] == pytest.approx(0.06)
    assert f.cpu_hours["fixed"] == pytest.approx(0.09, rel=1e-6)
    assert f.cpu_hours["ratefit"] == pytest.approx(2.8 / 60)
    assert f.under_share == pytest.approx({"current": 1 / 6, "fixed": 1 / 6, "ratefit": 0.5})
    doc = to_json(Outcome(start=t0, end=t0 + 180, step_s=60, node_cpu=8, containers=[f],
                          changes={"ns/Deployment/w": {"changes": 1, "rollouts": 1, "resizes": 0}},
                          nodes={s: np.array([1, 1, 1]) for s in ("current", "fixed", "ratefit")}))
    # the JSON contract of issue 12
    assert set(doc) >= {"from", "to", "step_seconds", "totals", "workloads"}
    assert doc["step_seconds"] == 60
    tot = doc["totals"]
    assert set(tot) >= {"cpu_hours", "under_share", "changes", "rollouts", "resizes", "peak_nodes"}
    assert set(tot["cpu_hours"]) == {"usage", "current", "fixed", "ratefit"}
    assert set(tot["under_share"]) == set(tot["peak_nodes"]) == {"current", "fixed", "ratefit"}
    assert tot["under_share"]["ratefit"] == pytest.approx(0.5)
    (w,) = doc["workloads"]
    assert w["workload"] == "ns/Deployment/w" and (w["changes"], w["rollouts"], w["resizes"]) == (1, 1, 0)


# ---------------------------------------------------------------- a scenario replay


def truth_store(root: Path) -> Path:
    """A model store holding the scenario's TRUE curves plus a fixed band (no training)."""
    store = ModelStore(root)
    for svc in SCENARIO:
        for c in svc.containers:
            hi = 2.5 * svc.rate_profile.peak / svc.replicas * 1.1
            curve = DemandCurve.tabulate(lambda r, c=c: c.truth(r), rate_lo=0.0, rate_hi=hi, band=BAND)
            store.save(Artifact(
                key=f"{svc.namespace}/{svc.workload}/{c.name}", chosen="truth", coverage=0.95, rate_range=(0.0, hi),
                curve=CurveData(**curve.to_dict()), samples=1, samples_total=1, dropped={},
                cv=[CVRow(model="truth", rmse=0.0, mae=0.0, p95=0.0)], folds=5, seed=0,
                window=DataWindow(source="INVENTED Kestrel Post truth"), trained_at="2026-01-01T00:00:00Z").sealed())
    return root


def scenario_objects(policies: list[dict]) -> list[dict]:
    return [o for objs in manifest_objects().values() for o in objs] + policies


def extended(h: History, *, after: float, minutes: int, factor: float) -> History:
    """``h`` with every counter that is still alive at ``after`` continued for ``minutes``
    at ``factor`` × its last step's increase: a spike in the future of every earlier pass
    (samples are only ever added after ``after``; pods gone before it stay gone)."""
    def grow(group):
        out = []
        for ts, vs in group:
            if ts[-1] < after:
                out.append((ts, vs))
                continue
            per_s = (vs[-1] - vs[-2]) / (ts[-1] - ts[-2])
            extra_t = ts[-1] + 60.0 * np.arange(1, minutes + 1)
            extra_v = vs[-1] + factor * per_s * (extra_t - ts[-1])
            out.append((np.concatenate([ts, extra_t]), np.concatenate([vs, extra_v])))
        return out
    assert h.end <= after
    return History.build({k: grow(g) for k, g in h.requests.items()}, {k: grow(g) for k, g in h.cpu.items()})


def test_no_look_ahead_a_future_spike_changes_no_earlier_decision(tmp_path: Path) -> None:
    info = write_openmetrics(tmp_path / "h.om", end=END, hours=12, step_s=60, seed=5)
    hist = read_openmetrics(info.path, request_metric=REQUEST_METRIC)
    spiked = extended(hist, after=hist.end, minutes=120, factor=6.0)
    targets = targets_from_objects(scenario_objects(default_policies()))
    sizer = StoreSizer(truth_store(tmp_path / "store"))
    n = int((hist.end - hist.start) // 300) + 1  # passes inside the original history
    keep = tuple(range(n))
    base = run_replay(hist, targets, sizer, start=hist.start, end=hist.end, keep=keep)
    more = run_replay(spiked, targets, sizer, start=hist.start, end=hist.end + 7200, keep=keep)
    # the spike is real: after the original end the rates jump
    tr = more.tracks[("parcels/label-printer", "app")]
    assert np.nanmax(tr.rate[n:]) > 3 * tr.rate[n - 1]
    for key, track in base.tracks.items():
        np.testing.assert_array_equal(track.rate, more.tracks[key].rate[:n])
        np.testing.assert_array_equal(track.upper, more.tracks[key].upper[:n])
    assert base.sim.decisions == {i: more.sim.decisions[i] for i in keep}
    assert [c for c in more.sim.changes if c.decided_at <= hist.end] == base.sim.changes
    assert any(c.decided_at > hist.end for c in more.sim.changes)  # and the spike does move later passes


def replay_scenario(tmp: Path, *, hours: int):
    """(history, targets, replay) of the INVENTED scenario's last ``hours``, every policy at
    its defaults (apply mode), sized by the scenario's true curves."""
    info = write_openmetrics(tmp / "h.om", end=END, hours=hours, step_s=60, seed=0)
    hist = read_openmetrics(info.path, request_metric=REQUEST_METRIC)
    targets = targets_from_objects(scenario_objects(default_policies()))
    res = run_replay(hist, targets, StoreSizer(truth_store(tmp / "store")), start=hist.start, end=hist.end)
    return hist, targets, res


@pytest.fixture(scope="module")
def week(tmp_path_factory):
    """The INVENTED scenario's week, replayed with every policy at its defaults (apply mode)."""
    return replay_scenario(tmp_path_factory.mktemp("week"), hours=168)


def test_defaults_on_the_invented_week_meet_the_acceptance_criteria(week) -> None:
    """Issue 12's acceptance criteria for the defaults, on OUR OWN INVENTED scenario (Kestrel
    Post, with truth-curve models): these are targets we set, not external facts."""
    hist, targets, res = week
    doc = to_json(res.outcome)
    tot = doc["totals"]
    days_after_first = (hist.end - hist.start) / 86400.0 - 1.0
    methods = {t.policy.workload_key: t.policy.resize_by.value for t in targets.targets}
    for w in doc["workloads"]:
        late = [c for c in res.sim.changes if c.workload == w["workload"] and c.decided_at >= hist.start + 86400]
        if methods[w["workload"]] == "Rollout":
            # at most one rollout per workload per day on average after the first day
            assert len(late) <= days_after_first, (w["workload"], len(late))
        else:
            # in-place follows the daily cycle: it goes up AND down on most days
            days = {int((c.decided_at - hist.start) // 86400) for c in late
                    if any(new < old for old, new, _, _ in c.containers.values() if old and new)}
            ups = {int((c.decided_at - hist.start) // 86400) for c in late
                   if any(new > old for old, new, _, _ in c.containers.values() if old and new)}
            assert len(days & ups) >= days_after_first - 1, (w["workload"], sorted(days), sorted(ups))
    assert tot["under_share"]["ratefit"] < 0.01
    assert tot["cpu_hours"]["ratefit"] <= tot["cpu_hours"]["current"] / 3
    assert tot["cpu_hours"]["ratefit"] <= tot["cpu_hours"]["fixed"]
    # the node count follows: ratefit's requests fit on fewer nodes than today's at the end
    assert res.outcome.nodes["ratefit"][-1] < res.outcome.nodes["current"][-1]


def test_the_command_prints_the_json_contract_and_writes_the_report(week, tmp_path: Path) -> None:
    hist, _targets, _res = week
    om = tmp_path / "h.om"
    write_openmetrics(om, end=END, hours=30, step_s=60, seed=1)
    store = truth_store(tmp_path / "store")
    man = tmp_path / "manifests"
    man.mkdir()
    import yaml

    (man / "all.yaml").write_text(yaml.safe_dump_all(scenario_objects(default_policies())))
    p = subprocess.run([str(RATEFIT), "replay", "--history", str(om), "-f", str(man), "--store", str(store),
                        "--rate-metric", REQUEST_METRIC, "--output", "json", "--report", str(tmp_path / "rep")],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr
    doc = json.loads(p.stdout)
    assert doc["step_seconds"] == 300 and doc["from"].endswith("Z")
    assert {w["workload"] for w in doc["workloads"]} == {f"{s.namespace}/{s.kind}/{s.workload}" for s in SCENARIO}
    assert doc["totals"]["changes"] == doc["totals"]["rollouts"] + doc["totals"]["resizes"] > 0
    assert (tmp_path / "rep" / "cluster.png").stat().st_size > 1000
    assert (tmp_path / "rep" / "nodes.png").is_file() and (tmp_path / "rep" / "summary.md").is_file()
    assert json.loads((tmp_path / "rep" / "replay.json").read_text())["totals"] == doc["totals"]
    # bad input: one clear line, exit 2
    bad = subprocess.run([str(RATEFIT), "replay", "-f", str(man), "--store", str(store)],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "--history" in bad.stderr and len(bad.stderr.strip().splitlines()) == 1


def _ffd_by_the_book(sizes, node_m):
    """First fit decreasing written the plain way (a list scan per pod): the reference."""
    free, loads, over = [], [], 0
    for s in sorted(sizes, reverse=True):
        if s > node_m:
            over += 1
            free.append(-1)
            loads.append(s)
            continue
        for i, f in enumerate(free):
            if f >= s:
                free[i] -= s
                loads[i] += s
                break
        else:
            free.append(node_m - s)
            loads.append(s)
    return len(loads), tuple(loads), over


def test_first_fit_decreasing_equals_the_plain_scan_on_random_pods() -> None:
    rng = np.random.default_rng(7)
    for _ in range(300):
        sizes = rng.integers(1, 9000, int(rng.integers(0, 200))).tolist()
        p = first_fit_decreasing(sizes, 8000)
        assert (p.nodes, p.loads, p.oversized) == _ffd_by_the_book(sizes, 8000)


def test_window_quantiles_are_numpy_percentile_floats() -> None:
    """The vectorised window quantile gives exactly np.percentile's floats (numpy's
    'linear' method, Hyndman & Fan type 7), missing values left out."""
    from ratefit.controller.replay.series import window_quantiles

    rng = np.random.default_rng(1)
    v = rng.uniform(0, 100, 3000)
    v[rng.uniform(size=3000) < 0.1] = np.nan
    v[:40] = np.nan
    lo = np.arange(0, 2800, 7)
    hi = lo + rng.integers(1, 200, len(lo))
    for q in (0.95, 0.5, 0.99):
        want = [np.percentile(w[~np.isnan(w)], q * 100) if (~np.isnan(w)).any() else np.nan
                for w in (v[a:b] for a, b in zip(lo, hi))]
        assert np.array_equal(window_quantiles(v, lo, hi, q), np.array(want), equal_nan=True)


def test_a_split_replay_equals_the_single_process_one(tmp_path: Path, monkeypatch) -> None:
    """Without a cluster budget workloads are independent and may be simulated in parallel:
    the merged result must be the one process's, change for change."""
    import ratefit.controller.replay.engine as engine

    info = write_openmetrics(tmp_path / "h.om", end=END, hours=10, step_s=60, seed=2)
    hist = read_openmetrics(info.path, request_metric=REQUEST_METRIC)
    targets = targets_from_objects(scenario_objects(default_policies()))
    sizer = StoreSizer(truth_store(tmp_path / "store"))
    opts = ReplayOptions(budget=BudgetConfig(per_minute=0, max_rollouts=0))
    keep = (10, 60, 110)
    one = run_replay(hist, targets, sizer, start=hist.start, end=hist.end, options=opts, keep=keep)
    monkeypatch.setattr(engine, "PARALLEL_FROM", 1)
    monkeypatch.setattr(engine.os if hasattr(engine, "os") else __import__("os"), "sched_getaffinity",
                        lambda _pid: {0, 1}, raising=False)
    split = run_replay(hist, targets, sizer, start=hist.start, end=hist.end, options=opts, keep=keep)
    assert split.sim.changes == one.sim.changes and split.sim.changes
    assert split.sim.steps == one.sim.steps
    assert split.sim.decisions == one.sim.decisions
    assert to_json(split.outcome) == to_json(one.outcome)


def test_replay_reads_policies_and_workloads_from_a_cluster_and_writes_nothing(tmp_path: Path) -> None:
    """--kubeconfig: the sandbox API server (a local stand-in for Kubernetes) holding the
    scenario; the replay only LISTs — every resourceVersion stays as it was."""
    import httpx

    from reconcile_fixtures import CRD
    from ratefit.controller.sandbox import SandboxServer

    info = write_openmetrics(tmp_path / "h.om", end=END, hours=6, step_s=60, seed=1)
    store = truth_store(tmp_path / "store")
    sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD]).start()
    try:
        for o in scenario_objects(default_policies()):
            if o["kind"] != "Service":
                sb.create(o)
        kc = sb.write_kubeconfig(tmp_path / "kubeconfig")

        def versions() -> dict[str, str]:
            out = {}
            for path in ("/apis/apps/v1/deployments", "/apis/apps/v1/statefulsets",
                         "/apis/ratefit.dev/v1alpha1/sizingpolicies"):
                for o in httpx.get(sb.url + path, timeout=10).json()["items"]:
                    out[path + o["metadata"]["name"]] = o["metadata"]["resourceVersion"]
            return out

        before = versions()
        p = subprocess.run([str(RATEFIT), "replay", "--kubeconfig", str(kc), "--history", str(info.path),
                            "--store", str(store), "--rate-metric", REQUEST_METRIC, "--output", "json"],
                           capture_output=True, text=True, timeout=300)
        assert p.returncode == 0, p.stderr
        assert versions() == before
    finally:
        sb.stop()
    doc = json.loads(p.stdout)
    assert {w["workload"] for w in doc["workloads"]} == {f"{s.namespace}/{s.kind}/{s.workload}" for s in SCENARIO}
    assert doc["totals"]["cpu_hours"]["current"] > doc["totals"]["cpu_hours"]["ratefit"] > 0
