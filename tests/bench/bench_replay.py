"""Benchmark: `ratefit replay` over 7 days at 5-minute passes, 1,000 workloads / 2,000 containers.

``python -m tests.bench.bench_replay [--workloads 1000] [--days 7] [--scaling] [--with-budget] [--profile FILE]``

INVENTED synthetic cluster: each workload has 2 pods and 2 containers (linear demand
curves, a daily cycle with a per-workload phase), one in four resizes in place, the rest
by rollout, every sizing field at its default. Counters are sampled every 5 minutes (a
week at 60 s would be 60 M samples), so the rate template is ``rate(…[10m])`` with a
5-minute subquery step. The model store is written to a temporary folder first (not
timed). Prints wall time per phase (rates and sizing answers, the passes, usage and
figures with the node counts), the total, and the peak RSS of this process; with
``--scaling`` also the same at ¼ and ½ of the workloads and of the days, to show how the
time grows. A benchmark, not a test: nothing is asserted (goal: < 60 s, < 1 GB).
"""

from __future__ import annotations

import argparse
import os
import resource
import tempfile
import time
from pathlib import Path

import numpy as np

from ratefit.controller.replay import History, StoreSizer, run_replay, targets_from_objects
from ratefit.controller.replay.engine import ReplayOptions
from ratefit.controller.replay.simulate import BudgetConfig
from ratefit.models.store import ModelStore
from tests.bench.machine import cpu_model

STEP = 300.0
END = 1_767_225_600.0


def cluster(workloads: int, days: float, seed: int = 0) -> tuple[History, list[dict], dict[str, tuple[float, float]]]:
    rng = np.random.default_rng(seed)
    n = int(days * 86400 / STEP) + 1
    t = END - STEP * np.arange(n - 1, -1, -1)
    requests: dict = {}
    cpu: dict = {}
    objs: list[dict] = []
    curves: dict[str, tuple[float, float]] = {}
    for w in range(workloads):
        ns, name = f"ns{w % 20}", f"w{w}"
        peak = float(rng.uniform(20, 400))
        phase = float(rng.uniform(0, 24))
        daily = 0.15 + 0.85 * 0.5 * (1 + np.cos(2 * np.pi * ((t / 3600) % 24 - phase) / 24))
        conts = []
        for c in ("app", "side"):
            base, slope = float(rng.uniform(0.02, 0.2)), float(rng.uniform(0.0005, 0.004))
            curves[f"{ns}/{name}/{c}"] = (base, slope)
            conts.append({"name": c, "resources": {"requests": {"cpu": f"{int(rng.uniform(200, 2000))}m"}}})
        for p in range(2):
            pod = f"{name}-7c9f5d4b2-xz2k{'bc'[p]}"  # a Deployment's pod name: <name>-<hash>-<suffix>
            rate = peak * daily * (1 + 0.05 * rng.standard_normal(n)).clip(0.5)
            requests[(ns, pod)] = [(t, np.cumsum(rate * STEP))]
            for c in ("app", "side"):
                base, slope = curves[f"{ns}/{name}/{c}"]
                use = (base + slope * rate) * (1 + 0.03 * rng.standard_normal(n)).clip(0.5)
                cpu[(ns, pod, c)] = [(t, np.cumsum(use * STEP))]
        objs.append({"apiVersion": "apps/v1", "kind": "Deployment", "metadata": {"namespace": ns, "name": name},
                     "spec": {"template": {"spec": {"containers": conts}}}})
        objs.append({"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
                     "metadata": {"namespace": ns, "name": name},
                     "spec": {"workload": {"kind": "Deployment", "name": name}, "mode": "Apply",
                              "resizeBy": "InPlace" if w % 4 == 0 else "Rollout",
                              "containers": [{"name": c, "model": f"{ns}/{name}/{c}"} for c in ("app", "side")]}})
    return History.build(requests, cpu, source="bench"), objs, curves


def write_store(root: Path, curves: dict[str, tuple[float, float]]) -> None:
    """Linear INVENTED curves base + slope × rate with a 0.01-core band."""
    from tests.api_fixtures import make_artifact

    store = ModelStore(root)
    for key, (base, slope) in curves.items():
        store.save(make_artifact(key, base=base, slope=slope, rate_hi=600.0, band=0.01))


def one(workloads: int, days: float, budget: BudgetConfig = BudgetConfig(per_minute=0, max_rollouts=0)) -> dict[str, float]:
    hist, objs, curves = cluster(workloads, days)
    with tempfile.TemporaryDirectory() as tmp:
        write_store(Path(tmp), curves)
        targets = targets_from_objects(objs)
        marks: list[float] = []
        c0 = os.times()
        t0 = time.perf_counter()
        res = run_replay(hist, targets, StoreSizer(tmp), start=hist.start, end=hist.end,
                         options=ReplayOptions(step_s=STEP, rate_interval_s=600.0, rate_step_s=STEP,
                                               budget=budget),
                         progress=lambda _m: marks.append(time.perf_counter()))
        t3 = time.perf_counter()
        c1 = os.times()
    cpu = (c1.user + c1.system + c1.children_user + c1.children_system) - (
        c0.user + c0.system + c0.children_user + c0.children_system)
    return {"cpu": cpu, "rates": marks[0] - t0, "passes": marks[1] - marks[0], "figures": t3 - marks[1], "total": t3 - t0,
            "passes_n": len(res.sim.pass_times), "changes": len(res.sim.changes),
            "containers": sum(len(t.policy.containers) for t in targets.targets)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.bench_replay", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--workloads", type=int, default=1000)
    ap.add_argument("--days", type=float, default=7.0)
    ap.add_argument("--scaling", action="store_true", help="also ¼ and ½ of the workloads and of the days")
    ap.add_argument("--with-budget", action="store_true",
                    help="the cluster budget of ratefit replay's defaults (2 changes a minute, one rollout at a "
                         "time): every workload shares it, so the passes run in one process")
    ap.add_argument("--profile", metavar="FILE",
                    help="run one size in one process under cProfile (no forked split), write the stats to FILE "
                         "(pstats format) and print the 25 costliest functions by own time")
    a = ap.parse_args(argv)
    if a.profile:
        import cProfile
        import pstats

        import ratefit.controller.replay.engine as engine

        engine.PARALLEL_FROM = 10**9  # forked workers would escape the profiler
        prof = cProfile.Profile()
        r = prof.runcall(one, a.workloads, a.days, BudgetConfig() if a.with_budget else BudgetConfig(0, 0))
        prof.dump_stats(a.profile)
        print(f"replay {a.workloads} workloads, {a.days:g} days under cProfile: total {r['total']:.1f} s wall "
              f"(rates+sizing {r['rates']:.1f} s, passes {r['passes']:.1f} s, figures {r['figures']:.1f} s)")
        pstats.Stats(a.profile).sort_stats("tottime").print_stats(25)
        return 0
    import platform

    print(f"machine: nproc {os.cpu_count()}, {cpu_model()}, Python {platform.python_version()}")
    sizes = [(a.workloads, a.days)]
    if a.scaling:
        sizes = [(a.workloads // 4, a.days), (a.workloads // 2, a.days), (a.workloads, a.days / 4),
                 (a.workloads, a.days / 2), *sizes]
    for w, d in sizes:
        r = one(w, d, BudgetConfig() if a.with_budget else BudgetConfig(per_minute=0, max_rollouts=0))
        print(f"replay {w} workloads / {r['containers']} containers, {d:g} days = {r['passes_n']} passes: "
              f"rates+sizing {r['rates']:.1f} s, passes {r['passes']:.1f} s, usage+figures+nodes {r['figures']:.1f} s, "
              f"total {r['total']:.1f} s wall, {r['cpu']:.1f} s CPU (all processes); "
              f"{r['cpu'] / max(1, r['passes_n'] * w) * 1e6:.0f} µs CPU per workload-pass; {r['changes']} changes",
              flush=True)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"peak RSS {rss:.0f} MB (this process, the largest size included); largest forked pass worker "
          f"{kids:.0f} MB (pages shared with this process counted again)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
