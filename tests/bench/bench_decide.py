"""Benchmark: the pure decision for N workloads (2 containers each), no I/O.

    .venv/bin/python -m tests.bench.bench_decide [--workloads 10000] [--pods 4] [--repeat 3]

Builds INVENTED policies (through ``parse_policy``) and observations, then times per
pass: ``rate_percentile`` of each container's per-pod rates, ``decide_workload`` with a
shared budget snapshot, and the status rendering (``to_status`` + ``history_to_status``).
Prints wall and CPU time per container (the issue's goal: under 100 µs per container
outside I/O, for the whole controller), and ``parse_policy`` per policy. A benchmark,
not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import platform
import random
import statistics
import time
from datetime import datetime, timedelta, timezone

from ratefit.controller.decide import ContainerInput, Sizing, decide_workload, rate_percentile
from ratefit.controller.limits import Budget, RolloutSlots, TokenBucket
from ratefit.controller.policy import ContainerHistory, WorkloadHistory, history_to_status, parse_policy
from tests.bench.machine import cpu_model


def policy_obj(i: int) -> dict:
    return {
        "apiVersion": "ratefit.dev/v1alpha1",
        "kind": "SizingPolicy",
        "metadata": {"name": f"svc-{i}", "namespace": f"ns-{i % 50}", "generation": 1},
        "spec": {
            "workload": {"kind": "Deployment", "name": f"svc-{i}"},
            "mode": "Apply" if i % 2 else "DryRun",
            "containers": [
                {"name": "app", "model": f"ns-{i % 50}/svc-{i}/app", "floor": "20m", "ceiling": "8"},
                {"name": "sidecar", "model": f"ns-{i % 50}/svc-{i}/sidecar", "ceiling": "1"},
            ],
        },
    }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--workloads", type=int, default=10_000)
    ap.add_argument("--pods", type=int, default=4)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rng = random.Random(1)
    now = datetime(2026, 12, 1, 12, 0, tzinfo=timezone.utc)

    t0, c0 = time.perf_counter(), time.process_time()
    policies = [parse_policy(policy_obj(i)) for i in range(args.workloads)]
    parse_wall, parse_cpu = time.perf_counter() - t0, time.process_time() - c0

    world = []
    for i, p in enumerate(policies):
        inputs = []
        for c in p.containers:
            mean = rng.uniform(1, 300)
            samples = [mean * rng.uniform(0.8, 1.2) for _ in range(args.pods)]
            req = rng.choice([None, 50, 250, 500, 1000, 2000])
            lim = None if req is None or rng.random() < 0.3 else 2 * req
            inputs.append((c.name, req, lim, samples, rng.uniform(0.01, 3.0)))
        hist = WorkloadHistory(
            last_change=now - timedelta(minutes=rng.choice([5, 45, 600])),
            containers={"app": ContainerHistory(below_since=now - timedelta(hours=3), peak_m=300)} if i % 3 == 0 else {},
        )
        world.append((p, inputs, hist, i % 7 == 0))

    walls, cpus = [], []
    for _ in range(args.repeat):
        budget = Budget(bucket=TokenBucket.per_minute(50, now=0.0), slots=RolloutSlots(10))
        t0, c0 = time.perf_counter(), time.process_time()
        changed = 0
        for p, inputs, hist, hpa in world:
            obs = []
            for name, req, lim, samples, upper in inputs:
                rate = rate_percentile(samples, p.rate_percentile)
                obs.append(ContainerInput(name, req, lim, rate, Sizing(upper * 0.8, upper)))
            wd = decide_workload(p, obs, history=hist, now=now, budget=budget.view(0.0), hpa_on_cpu=hpa)
            if wd.changed and budget.spend(wd.workload, 0.0):
                changed += 1
            _ = [d.to_status() for d in wd.decisions], history_to_status(wd.history)
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)

    n = 2 * args.workloads
    wall, cpu = statistics.median(walls), statistics.median(cpus)
    print(f"machine: nproc={os.cpu_count()} cpu={cpu_model()!r} python={platform.python_version()}")
    print(f"workloads={args.workloads} containers={n} pods/container={args.pods} repeat={args.repeat}")
    print(f"parse_policy: {parse_wall * 1e6 / args.workloads:.1f} µs wall, {parse_cpu * 1e6 / args.workloads:.1f} µs CPU per policy")
    print(f"decide pass (percentile + decide + status): {wall:.3f} s wall, {cpu:.3f} s CPU (median of {args.repeat})")
    print(f"  per container: {wall * 1e6 / n:.1f} µs wall, {cpu * 1e6 / n:.1f} µs CPU; workloads changed in last pass: {changed}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
