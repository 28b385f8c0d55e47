"""The replay's shortcuts (history given directly, settled passes skipped) change nothing.

The reference is the straightforward replay: ``simulate(..., shortcut=False)`` decides
every workload at every pass through the live loop's decide stage and carries the history
through the status text (``history_to_status`` / ``history_from_status``), as the live
loop does. The optimised replay must give exactly the same JSON, changes, request steps
and kept decisions — on the INVENTED Kestrel Post demo scenario and on random small
INVENTED clusters whose loads hold still for hours (so that passes are really skipped).
"""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np
import pytest

import ratefit.controller.replay.engine as engine
from ratefit.controller.replay import History, StoreSizer, read_openmetrics, run_replay, targets_from_objects, to_json
from ratefit.controller.replay.engine import ReplayOptions
from ratefit.controller.replay.simulate import BudgetConfig, carried, simulate
from ratefit.controller.policy import ContainerHistory, WorkloadHistory, history_from_status, history_to_status
from ratefit.controller.stages.decide import Decider
from ratefit.models.scenario import write_openmetrics
from ratefit.models.scenario.manifests import default_policies
from ratefit.models.scenario.services import REQUEST_METRIC
from ratefit.models.store import ModelStore
from api_fixtures import make_artifact
from test_replay import END, scenario_objects, truth_store


def write_store(root: Path, curves: dict[str, tuple[float, float]]) -> None:
    """Linear INVENTED curves base + slope × rate with a 0.01-core band."""
    store = ModelStore(root)
    for key, (base, slope) in curves.items():
        store.save(make_artifact(key, base=base, slope=slope, rate_hi=400.0, band=0.01))


def both(monkeypatch, *args, **kwargs):
    """(straightforward, optimised) replays of the same inputs, one process each, with the
    number of decisions each made."""
    monkeypatch.setattr(engine, "PARALLEL_FROM", 10**9)
    calls = {"n": 0}
    real = Decider.decide_one

    def counting(self, *a, **k):
        calls["n"] += 1
        return real(self, *a, **k)

    monkeypatch.setattr(Decider, "decide_one", counting)
    monkeypatch.setattr(engine, "simulate", functools.partial(simulate, shortcut=False))
    plain = run_replay(*args, **kwargs)
    n_plain = calls["n"]
    calls["n"] = 0
    monkeypatch.setattr(engine, "simulate", simulate)
    fast = run_replay(*args, **kwargs)
    return plain, fast, n_plain, calls["n"]


def assert_same(plain, fast) -> None:
    assert fast.sim.changes == plain.sim.changes
    assert fast.sim.steps == plain.sim.steps
    assert fast.sim.decisions == plain.sim.decisions
    assert fast.sim.states == plain.sim.states
    assert to_json(fast.outcome) == to_json(plain.outcome)


@pytest.mark.parametrize("budget", [BudgetConfig(), BudgetConfig(per_minute=0, max_rollouts=0)])
def test_the_demo_scenario_replays_the_same_with_the_shortcuts(tmp_path: Path, monkeypatch, budget) -> None:
    info = write_openmetrics(tmp_path / "h.om", end=END, hours=24, step_s=60, seed=3)
    hist = read_openmetrics(info.path, request_metric=REQUEST_METRIC)
    targets = targets_from_objects(scenario_objects(default_policies()))
    sizer = StoreSizer(truth_store(tmp_path / "store"))
    keep = (5, 100, 200)
    plain, fast, n_plain, n_fast = both(monkeypatch, hist, targets, sizer, start=hist.start, end=hist.end,
                                        options=ReplayOptions(budget=budget), keep=keep)
    assert plain.sim.changes  # the scenario does move requests
    assert n_fast <= n_plain
    assert_same(plain, fast)


def plateau_cluster(rng: np.random.Generator, workloads: int, hours: int) -> tuple[History, list[dict], dict]:
    """An INVENTED cluster whose per-pod rates hold one of a few levels for hours at a time,
    with random requests, limits, methods, modes, autoscalers and sizing fields."""
    step = 60.0
    n = hours * 60 + 1
    t = END - step * np.arange(n - 1, -1, -1)
    requests: dict = {}
    cpu: dict = {}
    objs: list[dict] = []
    curves: dict = {}
    for w in range(workloads):
        ns, name = f"ns{w % 3}", f"w{w}"
        levels = rng.choice([5.0, 20.0, 60.0, 150.0, 300.0], size=max(2, hours // 4))
        seg = rng.integers(0, len(levels), size=n // 120 + 1).repeat(120)[:n]
        rate = levels[seg]
        conts = []
        for c in ("app", "side"):
            base, slope = float(rng.uniform(0.02, 0.2)), float(rng.uniform(0.0005, 0.004))
            curves[f"{ns}/{name}/{c}"] = (base, slope)
            res: dict = {"requests": {"cpu": f"{int(rng.uniform(50, 1500))}m"}}
            if rng.random() < 0.3:
                res["limits"] = {"cpu": f"{int(rng.uniform(1500, 3000))}m"}
            conts.append({"name": c, "resources": res})
        for p in range(2):
            pod = f"{name}-7c9f5d4b2-xz2k{'bc'[p]}"
            requests[(ns, pod)] = [(t, np.cumsum(rate * step))]
            for c in ("app", "side"):
                base, slope = curves[f"{ns}/{name}/{c}"]
                cpu[(ns, pod, c)] = [(t, np.cumsum((base + slope * rate) * step))]
        objs.append({"apiVersion": "apps/v1", "kind": "Deployment", "metadata": {"namespace": ns, "name": name},
                     "spec": {"template": {"spec": {"containers": conts}}}})
        if rng.random() < 0.2:
            objs.append({"apiVersion": "autoscaling/v2", "kind": "HorizontalPodAutoscaler",
                         "metadata": {"namespace": ns, "name": name},
                         "spec": {"scaleTargetRef": {"kind": "Deployment", "name": name}}})
        objs.append({"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
                     "metadata": {"namespace": ns, "name": name},
                     "spec": {"workload": {"kind": "Deployment", "name": name},
                              "mode": "Apply" if rng.random() < 0.8 else "DryRun",
                              "resizeBy": "InPlace" if rng.random() < 0.4 else "Rollout",
                              "containers": [{"name": c, "model": f"{ns}/{name}/{c}"} for c in ("app", "side")]}})
    return History.build(requests, cpu, source="INVENTED plateaus"), objs, curves


@pytest.mark.parametrize("seed", [1, 2])
def test_a_random_small_cluster_replays_the_same_with_the_shortcuts(tmp_path: Path, monkeypatch, seed) -> None:
    rng = np.random.default_rng(seed)
    hist, objs, curves = plateau_cluster(rng, workloads=8, hours=36)
    write_store(tmp_path, curves)
    targets = targets_from_objects(objs)
    sizer = StoreSizer(tmp_path)
    # a start off the whole second: the status keeps whole seconds, the shortcut must too
    start = hist.start + 0.25
    for budget, as_written in ((BudgetConfig(per_minute=0, max_rollouts=0), False), (BudgetConfig(), True)):
        plain, fast, n_plain, n_fast = both(monkeypatch, hist, targets, sizer, start=start, end=hist.end,
                                            options=ReplayOptions(budget=budget, as_written=as_written,
                                                                  rate_interval_s=300.0, rate_step_s=60.0),
                                            keep=(3, 50, 300))
        assert plain.sim.changes
        assert n_fast < n_plain / 2  # the plateaus are really skipped
        assert_same(plain, fast)


def test_carried_is_the_status_round_trip() -> None:
    """``carried`` gives what the status text gives back (metav1.Time has whole seconds:
    Kubernetes API conventions, "Time" is serialised RFC 3339 at second precision)."""
    from datetime import datetime, timezone

    t = datetime(2026, 1, 1, 12, 0, 7, 250_000, tzinfo=timezone.utc)
    for h in (WorkloadHistory(),
              WorkloadHistory(last_change=t, containers={"a": ContainerHistory(below_since=t, peak_m=250),
                                                         "b": ContainerHistory()}),
              WorkloadHistory(last_change=t.replace(microsecond=0),
                              containers={"a": ContainerHistory(below_since=t.replace(microsecond=0), peak_m=5)})):
        back = history_from_status(history_to_status(h, [{"name": n} for n in ("a", "b", "c")]))
        got = carried(h)
        assert got.last_change == back.last_change
        for name in ("a", "b", "c"):
            assert got.container(name) == back.container(name)


def _one_container_policy(**spec) -> dict:
    return {"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
            "metadata": {"namespace": "ns", "name": "w"},
            "spec": {"workload": {"kind": "Deployment", "name": "w"}, "mode": "Apply", "headroomPercent": 0,
                     "settle": "30m", "containers": [{"name": "app", "model": "ns/w/app"}], **spec}}


def test_a_decrease_settling_under_a_cpu_autoscaler_is_decided_again_when_its_window_ends() -> None:
    """Held HorizontalConflict can hide a settling decrease whose window ends with the clock
    (a fresh settle window starts when the highest target seen proves inside the deadband):
    such passes are not skipped. Hand-made INVENTED inputs at 5-minute passes, request 1000m,
    deadband 10 %: target 950m (inside the deadband, starts the settling record with peak
    950m), then 500m for good (a decrease: Settling, held HorizontalConflict). After the 30m
    settle the highest target, 950m, is inside the deadband: a fresh window starts then."""
    from datetime import datetime, timezone

    from ratefit.controller.decide import Why
    from ratefit.controller.policy import parse_policy
    from ratefit.controller.replay.simulate import ReplayTarget, SizingTrack

    p = parse_policy(_one_container_policy())
    n = 24
    upper = np.array([0.95] + [0.5] * (n - 1))
    track = SizingTrack(rate=np.full(n, 10.0), demand=upper - 0.01, upper=upper, extrapolated=np.zeros(n, dtype=bool))
    times = END + 300.0 * np.arange(n)
    target = ReplayTarget(policy=p, containers={"app": (1000, None)}, hpa_on_cpu=True)
    every = simulate([target], {(p.key, "app"): track}, times, keep=tuple(range(n)), shortcut=False)
    whys = [every.decisions[i][0].decisions[0].why for i in range(n)]
    # pass 0 inside the deadband, then held by the autoscaler while settling; the fresh
    # window at the end of the first settle period (pass 0 + 30 min = pass 6) says InsideDeadband
    assert whys[0] is Why.INSIDE_DEADBAND and whys[1] is Why.HORIZONTAL_CONFLICT
    assert whys[6] is Why.INSIDE_DEADBAND
    fresh = every.decisions[6][0].history.container("app")
    assert (fresh.below_since, fresh.peak_m) == (datetime.fromtimestamp(times[6], tz=timezone.utc), 500)
    # the shortcut may skip passes 2…6 and 8…: the kept passes after them must be the same
    keep = (0, 1, 7, 8, 20)
    runs = [simulate([target], {(p.key, "app"): track}, times, keep=keep, shortcut=s) for s in (False, True)]
    assert runs[1].decisions == runs[0].decisions
    assert runs[1].states == runs[0].states


def test_a_cluster_queueing_for_the_budget_replays_the_same_with_the_shortcuts(tmp_path: Path, monkeypatch) -> None:
    """Thirty INVENTED workloads behind a budget of one change a minute and one rollout at
    a time: most passes hold most workloads BudgetSpent. The shortcut decides such a hold
    again only when the budget, read at its turn in the pass, would let it go."""
    from ratefit.controller.decide import Why

    rng = np.random.default_rng(7)
    hist, objs, curves = plateau_cluster(rng, workloads=30, hours=12)
    write_store(tmp_path, curves)
    targets = targets_from_objects(objs)
    sizer = StoreSizer(tmp_path)
    keep = (2, 20, 60, 130)
    plain, fast, n_plain, n_fast = both(monkeypatch, hist, targets, sizer, start=hist.start, end=hist.end,
                                        options=ReplayOptions(budget=BudgetConfig(per_minute=1, max_rollouts=1),
                                                              rate_interval_s=300.0, rate_step_s=60.0),
                                        keep=keep)
    held = sum(d.why is Why.BUDGET_SPENT for i in keep for wd in plain.sim.decisions[i] for d in wd.decisions)
    assert held >= 10, held  # the budget really queues them
    assert n_fast < n_plain / 2
    assert_same(plain, fast)
