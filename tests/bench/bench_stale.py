"""Benchmark: the cost of the staleness check (issue 13) at scale.

    python -m tests.bench.bench_stale [--workloads 2000] [--per-pass 100] [--jobs 3]

Real parts: the real Prometheus holding 6 h 10 min of an INVENTED benchmark history (one
Deployment pod per workload, container ``app``: a request counter and the cAdvisor CPU
counter, CPU = 0.05 + 0.004 × rate cores) and a real ``ratefit serve`` over one linear model
per workload. Measured: one judgement job as ``ratefit run``'s background judge runs it
(``Observer._judge``: two range queries per container over the 6 h window at 5 m steps,
then one sizing batch for the bands) for ``--per-pass`` containers — its wall and CPU
time — and from that how many containers one judge keeps judged every ``--stale-every``
(10 min). The pass itself does not wait for these jobs (controller/stale_memo.py).
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

from tests.bench.machine import cpu_model

ROOT = Path(__file__).resolve().parents[2]
POD = "5d4c7b9f8-bcdfg"  # a Deployment pod's suffix (controller/pod_names.py)


def write_history(path: Path, n: int, *, end: float, minutes: int = 370, step_s: int = 60) -> None:
    start = end - minutes * 60
    ts = [start + k * step_s for k in range(minutes * 60 // step_s + 1)]
    with open(path, "w") as f:
        f.write("# HELP http_requests Requests (INVENTED benchmark scenario).\n# TYPE http_requests counter\n")
        for i in range(n):
            rate = 5.0 + (i % 40)
            lab = f'namespace="bench",pod="wl-{i:05d}-{POD}"'
            f.write("".join(f"http_requests_total{{{lab}}} {rate * (t - start):.3f} {t:.0f}\n" for t in ts))
        f.write("# HELP container_cpu_usage_seconds CPU (INVENTED benchmark scenario).\n"
                "# TYPE container_cpu_usage_seconds counter\n")
        for i in range(n):
            cores = 0.05 + 0.004 * (5.0 + (i % 40))
            lab = f'namespace="bench",pod="wl-{i:05d}-{POD}",container="app"'
            f.write("".join(f"container_cpu_usage_seconds_total{{{lab}}} {cores * (t - start):.4f} {t:.0f}\n"
                            for t in ts))
        f.write("# EOF\n")


def main() -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.bench_stale", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--workloads", type=int, default=2000)
    ap.add_argument("--per-pass", type=int, default=100, help="containers judged per job (--stale-per-pass)")
    ap.add_argument("--jobs", type=int, default=3, help="jobs timed (each over other containers)")
    args = ap.parse_args()
    sys.path.insert(0, str(ROOT / "tests"))
    from api_fixtures import make_artifact

    from ratefit.controller.local_servers import backfill, run_prometheus, run_serve
    from ratefit.controller.metrics_source import RateRequest
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.controller.stale_memo import JudgementMemo
    from ratefit.controller.stages.observe import Observer
    from ratefit.controller.telemetry import Telemetry
    from ratefit.controller.usage_source import ModelFacts, PrometheusUsageSource
    from ratefit.models.prometheus import PrometheusClient
    from ratefit.models.store import ModelStore

    n = args.workloads
    print(f"bench_stale: {n} workloads; nproc {os.cpu_count()}, {cpu_model()}, Python {platform.python_version()}; "
          f"load average {os.getloadavg()[0]:.2f}", flush=True)
    end = float(int(time.time()) - 120)
    with tempfile.TemporaryDirectory(prefix="ratefit-bench-stale-") as tmp:
        work = Path(tmp)
        t0 = time.perf_counter()
        write_history(work / "history.om", n, end=end)
        backfill(work / "history.om", work / "tsdb")
        store = ModelStore(work / "store")
        for i in range(n):
            store.save(make_artifact(f"bench/wl-{i:05d}/app", base=0.05, slope=0.004, rate_hi=100.0))
        print(f"  history (6 h 10 min, {2 * n} series) and {n} models ready in {time.perf_counter() - t0:.1f} s",
              flush=True)
        with run_prometheus(work / "tsdb") as prom, run_serve(work / "store", work) as api, \
                PrometheusClient(prom.url, timeout=120) as client, SizingClient(api.url, timeout=120) as sizing:
            memo = JudgementMemo(per_pass=args.per_pass)
            usage = PrometheusUsageSource(client, at=end, facts=ModelFacts(sizing), memo=memo,
                                          max_containers=args.per_pass)
            obs = Observer(reader=None, rates=None, sizing=sizing, telemetry=Telemetry(),  # type: ignore[arg-type]
                           usage=usage)
            asked = [RateRequest(namespace="bench", policy=f"wl-{i:05d}", workload=f"wl-{i:05d}", container="app",
                                 workload_kind="Deployment") for i in range(n)]
            kinds = {("bench", r.policy): "Deployment" for r in asked}
            models = {("bench", r.policy, "app"): f"bench/{r.policy}/app" for r in asked}
            walls, cpus, stale = [], [], 0
            for j in range(args.jobs):
                part = asked[j * args.per_pass:(j + 1) * args.per_pass]
                judged_model = {r.key: (models[("bench", r.policy, "app")], None) for r in part}
                errors: list[str] = []
                w0, c0 = time.perf_counter(), time.process_time()
                got = obs._judge(part, kinds, models, {}, judged_model, errors, memo, sizing)
                walls.append(time.perf_counter() - w0)
                cpus.append(time.process_time() - c0)
                assert not errors, errors
                assert len(got) == len(part), (len(got), len(part))
                stale += sum(1 for v in got.values() if v.stale)
            wall = sorted(walls)[len(walls) // 2]
            cpu = sorted(cpus)[len(cpus) // 2]
            print(f"\none judgement job of {args.per_pass} containers ({2 * args.per_pass} range queries over 6 h "
                  f"at 5 m, one sizing batch for the bands): wall {wall:.2f} s (min {min(walls):.2f} s), "
                  f"controller CPU {cpu:.2f} s (median of {args.jobs})")
            print(f"  {1000 * wall / args.per_pass:.1f} ms wall and {1000 * cpu / args.per_pass:.1f} ms CPU per "
                  f"container; {stale} of {args.jobs * args.per_pass} judged stale (the history follows the models: "
                  "expected about none)")
            print(f"  one judge could keep about {int(600 / wall * args.per_pass):,} containers judged every 10 min; "
                  f"with one job per pass of {args.per_pass} it judges {10 * args.per_pass:,} containers per 10 min at "
                  "1-minute passes (the pass never waits for it)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
