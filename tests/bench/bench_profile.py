"""Benchmark: how exact the profiler is against a real nginx (Debian nginx-light, gzip JSON).

    .venv/bin/python -m tests.bench.bench_profile [--rates 100,300,600] [--duration 5] [--parcels 1500]

Prints, per rate, the open-loop client's send rate and completed rate against the
target (error in %), and the send lag (sent − scheduled) p50/p99; then the profile's
fitted slope (cores per req/s) against the CPU per request measured on its own at
one rate (Utilization Law, U = X·S: the two should agree), with R². CPU from /proc of
nginx's master and worker. Needs nginx (apt-get install -y nginx-light). A benchmark,
not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/profile_servers.py

from profile_servers import nginx_missing_reason, run_nginx  # noqa: E402
from ratefit.controller.profile.cpu_probe import ProcTreeProbe  # noqa: E402
from ratefit.controller.profile.loadgen import LoadGenerator, Outcome, parse_target  # noqa: E402
from ratefit.controller.profile.steps import Criteria, StepPlan, run_profile  # noqa: E402
from tests.bench.machine import cpu_model  # noqa: E402


def accuracy(url: str, rate: float, duration: float) -> dict[str, float]:
    got: list[Outcome] = []

    async def go() -> float:
        gen = LoadGenerator(parse_target(url, headers={"Accept-Encoding": "gzip"}), timeout=5.0)
        t0 = await gen.run(rate, duration, got.append)
        await gen.aclose()
        return t0

    t0 = asyncio.run(go())
    sent = np.sort([o.sent for o in got])
    lag = np.array([o.sent - o.scheduled for o in got]) * 1000
    done = np.array([o.finished for o in got if o.ok])
    a, b = t0 + 0.5, t0 + duration
    achieved = np.count_nonzero((done >= a) & (done < b)) / (b - a)
    return {
        "send_rate": (len(sent) - 1) / (sent[-1] - sent[0]),
        "achieved": achieved,
        "lag_p50": float(np.percentile(lag, 50)),
        "lag_p99": float(np.percentile(lag, 99)),
        "errors": sum(1 for o in got if not o.ok),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rates", default="100,300,600")
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--parcels", type=int, default=1500)
    ap.add_argument("--profile-rates", default="40,80,120,160,200,240")
    args = ap.parse_args(argv)
    if nginx_missing_reason():
        print(nginx_missing_reason())
        return 1
    print(f"nproc {os.cpu_count()}, {cpu_model()}, load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory() as tmp, run_nginx(Path(tmp) / "nginx", parcels=args.parcels) as srv:
        print("| target req/s | send rate (error) | completed rate (error) | send lag p50 / p99 | errors |")
        print("| ---: | ---: | ---: | ---: | ---: |")
        for r in (float(x) for x in args.rates.split(",")):
            m = accuracy(srv.url, r, args.duration)
            print(
                f"| {r:g} | {m['send_rate']:.2f} ({100 * (m['send_rate'] / r - 1):+.2f} %) "
                f"| {m['achieved']:.2f} ({100 * (m['achieved'] / r - 1):+.2f} %) "
                f"| {m['lag_p50']:.2f} / {m['lag_p99']:.2f} ms | {m['errors']} |"
            )
        probe = ProcTreeProbe([srv.pid])
        s_rate = 150.0
        got: list[Outcome] = []

        async def single() -> tuple[float, float]:
            gen = LoadGenerator(parse_target(srv.url, headers={"Accept-Encoding": "gzip"}), timeout=5.0)
            loop = asyncio.get_running_loop()
            before = probe.read(wall=0, mono=loop.time()).cpu_seconds
            await gen.run(s_rate, args.duration, got.append)
            await asyncio.sleep(0.2)
            after = probe.read(wall=0, mono=loop.time()).cpu_seconds
            await gen.aclose()
            return before, after

        before, after = asyncio.run(single())
        s = (after - before) / sum(1 for o in got if o.ok)
        rates = [float(x) for x in args.profile_rates.split(",")]
        gen = LoadGenerator(parse_target(srv.url, headers={"Accept-Encoding": "gzip"}), timeout=5.0)
        prof = asyncio.run(run_profile(gen, probe, rates, StepPlan(step_duration=args.duration, warmup=1.0),
                                       Criteria(slo_p99_ms=500)))
    f = prof.fit
    print(f"\nCPU per request at {s_rate:g} req/s on its own: {1000 * s:.3f} ms")
    if f:
        print(f"profile {args.profile_rates} req/s x {args.duration:g} s: slope {1000 * f.slope:.3f} ms per request "
              f"({100 * (f.slope / s - 1):+.1f} % vs on its own), intercept {f.intercept:.4f} cores, R2 {f.r2:.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
