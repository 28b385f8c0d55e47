"""Benchmark: one grouped rate query for N workloads against the real Prometheus.

    .venv/bin/python -m tests.bench.bench_rates [--workloads 10000] [--pods 2] [--repeat 3]

Writes a synthetic history (INVENTED, constant per-pod rates: ``bench_http_requests_total``
for ``--workloads`` workloads × ``--pods`` pods, 30 s steps, ending 5 min ago), backfills
it with promtool, starts /usr/bin/prometheus on loopback and times
``PrometheusRateSource.per_pod_rates`` for two containers per workload (p95 over 1h, one
grouped instant query). Prints wall time, the controller's own CPU time (process time:
HTTP client, JSON decoding, splitting per workload) and CPU per container. Stops the
server on exit. A benchmark, not a test: nothing is asserted beyond correctness of counts.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/ for prom_fixtures

from prom_fixtures import backfill, binaries, run_prometheus  # noqa: E402

from ratefit.controller.metrics_source import PrometheusRateSource, RateRequest, RateTemplate  # noqa: E402
from ratefit.models.prometheus import PrometheusClient  # noqa: E402
from tests.bench.machine import cpu_model

METRIC = "bench_http_requests_total"
NAMESPACES = 50


def write_history(path: Path, *, workloads: int, pods: int, minutes: int, end: int) -> None:
    n = minutes * 2 + 1
    times = [str(end - 30 * (n - 1 - k)) for k in range(n)]
    with open(path, "w") as f:
        f.write("# HELP bench_http_requests INVENTED benchmark data\n# TYPE bench_http_requests counter\n")
        for w in range(workloads):
            ns = f"ns-{w % NAMESPACES}"
            for p in range(pods):
                rate = 1.0 + (w * 7 + p * 3) % 97
                head = f'{METRIC}{{namespace="{ns}",pod="w{w}-{p}",workload="w{w}"}} '
                f.write("".join(f"{head}{rate * 30 * (k + 1):.3f} {times[k]}\n" for k in range(n)))
        f.write("# EOF\n")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workloads", type=int, default=10_000)
    ap.add_argument("--pods", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--window-minutes", type=int, default=60)
    a = ap.parse_args()
    if binaries() is None:
        print("prometheus/promtool not installed", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="ratefit-bench-rates-") as tmp:
        base = Path(tmp)
        end = int(time.time() - 300) // 30 * 30
        t0 = time.perf_counter()
        write_history(base / "h.om", workloads=a.workloads, pods=a.pods, minutes=a.window_minutes + 5, end=end)
        t1 = time.perf_counter()
        backfill(base / "h.om", base / "tsdb")
        t2 = time.perf_counter()
        (base / "h.om").unlink()
        print(f"history: {a.workloads} workloads × {a.pods} pods written in {t1 - t0:.1f}s, backfilled in {t2 - t1:.1f}s",
              file=sys.stderr)
        reqs = [
            RateRequest(f"ns-{w % NAMESPACES}", f"p{w}", f"w{w}", c, rate_window=f"{a.window_minutes}m")
            for w in range(a.workloads) for c in ("app", "sidecar")
        ]
        ns_list = [f"ns-{i}" for i in range(min(NAMESPACES, a.workloads))]
        with run_prometheus(base / "tsdb") as srv, PrometheusClient(srv.url, timeout=120) as client:
            src = PrometheusRateSource(client, at=end, template=RateTemplate(metric=METRIC))
            src.per_pod_rates(reqs[:2])  # warm the connection
            walls, cpus = [], []
            for _ in range(a.repeat):
                c0, w0 = time.process_time(), time.perf_counter()
                got = src.per_pod_rates(reqs)
                walls.append(time.perf_counter() - w0)
                cpus.append(time.process_time() - c0)
                missing = sum(r.missing for r in got.values())
                assert missing == 0 and len(got) == len(reqs), (missing, len(got), next(iter(got.values())).message[:500])
            # the controller-side share: decoding + splitting of an answer already received
            from ratefit.controller import metrics_source as ms
            samples = client.query(ms.grouped_query(ms._groups(reqs), template=src.template, step=src.step), at=end)
        wall, cpu = statistics.median(walls), statistics.median(cpus)
        print(f"nproc={os.cpu_count()} cpu={cpu_model()!r} python={platform.python_version()}")
        print(f"containers={len(reqs)} workloads={a.workloads} pods/workload={a.pods} series answered={len(samples)} "
              f"window={a.window_minutes}m step=30s namespaces={len(ns_list)}")
        print(f"one grouped query pass: wall {wall:.3f}s (min {min(walls):.3f}s), "
              f"controller CPU {cpu:.3f}s = {cpu / len(reqs) * 1e6:.1f} µs/container (median of {a.repeat})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
