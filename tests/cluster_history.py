"""History in real counter conventions for pods of a (sandbox) cluster, as OpenMetrics for
``promtool tsdb create-blocks-from openmetrics`` (Prometheus docs, "Backfilling from
OpenMetrics format"). A helper for tests/test_train_policies.py and tests/test_docs_on_your_cluster.py.

INVENTED data (Kestrel Post naming). Per pod the request rate swings around its base,
``X(t) = base * (1 + 0.5 sin(2 pi t / 30 min))``, and the container's CPU follows the
Utilization Law ``U = X * S`` (Denning & Buzen, "The Operational Analysis of Queueing
Network Models", 1978) with a service demand ``S`` of 4 ms CPU per request, plus an idle
floor of 20 millicores: ``cpu(t) = 0.020 + 0.004 * X(t)`` cores. Counters are the exact
integrals of those rates (a counter is the running total; ``rate()`` is its per-second
increase — Prometheus docs, "Functions: rate"), so a model trained on them should find
that line.

Series (labels as the usual exporters write them):

* ``http_requests_total{namespace, pod}`` — an application's own request counter;
* the same pods in another namespace (``OTHER_NS``) at 100 req/s, never to be counted;
* cAdvisor: ``container_cpu_usage_seconds_total{namespace, pod, container}``, plus the
  pod-level ``container=""`` series (DESIGN.md facts: filter it out), and
  ``container_cpu_cfs_periods_total`` / ``container_cpu_cfs_throttled_periods_total``
  (10 periods/s of 100 ms, never throttled).
"""

from __future__ import annotations

import math
from pathlib import Path

IDLE_CORES = 0.020
SERVICE_DEMAND_S = 0.004  # CPU seconds per request
PERIOD_S = 1800.0
OTHER_NS = "bank"


def expected_cpu(rate: float) -> float:
    """The Utilization Law line the history follows: cores at ``rate`` req/s per pod."""
    return IDLE_CORES + SERVICE_DEMAND_S * rate


def _requests(base: float, t: float) -> float:
    # integral of base * (1 + 0.5 sin(2 pi u / P)) du from 0 to t
    return base * (t + 0.5 * PERIOD_S / (2 * math.pi) * (1 - math.cos(2 * math.pi * t / PERIOD_S)))


def write_history(path: Path, pods: dict[tuple[str, str], tuple[str, float]], *, end: float,
                  seconds: float = 7200, step: float = 15) -> Path:
    """``pods``: ``{(namespace, pod): (container, base req/s)}``. Returns ``path``."""
    start = end - seconds
    fam: dict[str, list[str]] = {}

    def series(name: str, labels: str, value_at) -> None:
        rows = fam.setdefault(name, [])
        n = int(seconds // step) + 1
        for k in range(n):
            t = k * step
            rows.append(f"{name}{{{labels}}} {value_at(t):.6f} {start + t:.0f}")

    for (ns, pod), (container, base) in sorted(pods.items()):
        series("http_requests_total", f'namespace="{ns}",pod="{pod}"', lambda t, b=base: _requests(b, t))
        series("http_requests_total", f'namespace="{OTHER_NS}",pod="{pod}"', lambda t: 100.0 * t)
        c = f'container="{container}",namespace="{ns}",pod="{pod}"'
        series("container_cpu_usage_seconds_total", c,
               lambda t, b=base: IDLE_CORES * t + SERVICE_DEMAND_S * _requests(b, t))
        series("container_cpu_usage_seconds_total", f'container="",namespace="{ns}",pod="{pod}"', lambda t: 9.0 * t)
        series("container_cpu_cfs_periods_total", c, lambda t: 10.0 * t)
        series("container_cpu_cfs_throttled_periods_total", c, lambda t: 0.0)
    out = []
    for name, rows in fam.items():
        out.append(f"# TYPE {name.removesuffix('_total')} counter")
        out += sorted(rows, key=lambda s: (s.rsplit(" ", 2)[0], float(s.rsplit(" ", 1)[1])))
    out.append("# EOF")
    path.write_text("\n".join(out) + "\n")
    return path
