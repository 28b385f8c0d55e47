"""Run every benchmark in turn and print their figures: ``make bench`` or
``python -m tests.bench.all [--quick] [NAME ...]``.

Each benchmark runs in its own process (so one's memory or threads never colour the
next) and prints its own figures; this runner adds a header naming the machine
(``nproc``, CPU model, Python) and the wall time of each. ``--quick`` passes smaller
sizes where a benchmark has them (for a smoke run; the documented figures come from
the full sizes). Benchmarks, not tests: nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import time
from tests.bench.machine import cpu_model

#: name → (module, full-size args, quick args)
BENCHES: dict[str, tuple[str, list[str], list[str]]] = {
    "models": ("tests.bench.bench_models", [], ["--sizes", "1000,10000", "--no-tune"]),
    "api": ("tests.bench.bench_api", [], ["--models", "2000", "--requests", "1000", "--rounds", "1"]),
    "decide": ("tests.bench.bench_decide", [], ["--workloads", "2000"]),
    "rates": ("tests.bench.bench_rates", [], ["--workloads", "1000"]),
    "sandbox": ("tests.bench.bench_sandbox", [], ["--deployments", "200", "--ops", "100"]),
    "kube": ("tests.bench.bench_kube", [], ["--workloads", "300", "--patches", "20"]),
    "reconcile": ("tests.bench.bench_reconcile", [], ["--workloads", "1000"]),
    "cache": ("tests.bench.bench_cache", [], ["--workloads", "1000", "--no-writes"]),
    "health": ("tests.bench.bench_health", [], ["--idle", "300", "--header-mib", "10"]),
    "profile": ("tests.bench.bench_profile", [], ["--duration", "3", "--rates", "100,300"]),
    "stale": ("tests.bench.bench_stale", ["--per-pass", "500"], ["--workloads", "300", "--per-pass", "100", "--jobs", "1"]),
    "replay": ("tests.bench.bench_replay", ["--scaling"], ["--workloads", "100", "--days", "2"]),
}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.all", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("names", nargs="*", metavar="NAME",
                    help=f"benchmarks to run (default: all of {', '.join(BENCHES)})")
    ap.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    args = ap.parse_args(argv)
    names = args.names or list(BENCHES)
    unknown = [n for n in names if n not in BENCHES]
    if unknown:
        ap.error(f"unknown benchmark {', '.join(unknown)}; choose from {', '.join(BENCHES)}")
    print(f"# ratefit benchmarks — nproc {os.cpu_count()}, {cpu_model()}, Python {platform.python_version()}, "
          f"{time.strftime('%Y-%m-%d %H:%M')}{' (quick sizes)' if args.quick else ''}", flush=True)
    failed = []
    for name in names:
        module, full, quick = BENCHES[name]
        print(f"\n## {name}: python -m {module} {' '.join(quick if args.quick else full)}", flush=True)
        t0 = time.monotonic()
        rc = subprocess.call([sys.executable, "-m", module, *(quick if args.quick else full)])
        print(f"## {name}: exit {rc}, {time.monotonic() - t0:.1f} s wall", flush=True)
        if rc:
            failed.append(name)
    if failed:
        print(f"\nfailed: {', '.join(failed)}", file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
