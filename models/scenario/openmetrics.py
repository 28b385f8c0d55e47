"""OpenMetrics history of the INVENTED Kestrel Post demo scenario, for promtool backfill.

INVENTED DATA. Writes cumulative counters (OpenMetrics text format 1.0: ``# TYPE`` per
family, samples of a series contiguous and in time order, timestamps in seconds, the
file ending in ``# EOF``) that ``promtool tsdb create-blocks-from openmetrics`` loads:

* ``kestrel_http_requests_total{namespace,pod,workload}`` — requests served per pod
  (the scenario's invented instrumentation);
* ``container_cpu_usage_seconds_total{namespace,pod,container}`` — cAdvisor CPU seconds;
* ``container_cpu_cfs_periods_total`` / ``container_cpu_cfs_throttled_periods_total``
  ``{namespace,pod,container}`` — only for containers with a CPU limit (a CFS quota),
  as cAdvisor does; 10 periods per second (100 ms period).

Counter value at sample time t = (value before the history) + Σ increments of the steps
up to t, so ``increase`` between two samples is exactly the simulated amount.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import numpy as np

from ratefit.models.scenario.generate import CFS_PERIODS_PER_SECOND, simulate
from ratefit.models.scenario.services import ORGANISATION, REQUEST_METRIC, Service

__all__ = ["HistoryInfo", "write_openmetrics", "FAMILIES"]

FAMILIES = (
    REQUEST_METRIC,
    "container_cpu_usage_seconds_total",
    "container_cpu_cfs_periods_total",
    "container_cpu_cfs_throttled_periods_total",
)


@dataclass(frozen=True, slots=True)
class HistoryInfo:
    """What :func:`write_openmetrics` wrote."""

    path: Path
    start: float  # first sample time (unix s)
    end: float  # last sample time (unix s; ``end`` aligned down to the step)
    step_s: float
    series: int
    samples: int


def _fmt_t(t: np.ndarray) -> list[str]:
    return [f"{x:.0f}" if float(x).is_integer() else repr(float(x)) for x in t]


def write_openmetrics(
    path: str | os.PathLike[str],
    *,
    end: float,
    hours: float = 48,
    step_s: float = 30,
    seed: int = 0,
    services: Iterable[Service | str] | None = None,
) -> HistoryInfo:
    """Write the scenario's history ending at ``end`` (aligned down to ``step_s``) to ``path``."""
    tracks = simulate(seed=seed, hours=hours, step_s=step_s, end=end, services=services)
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    n_series = n_samples = 0
    start_t, end_t = float("inf"), float("-inf")
    with open(p, "w") as f:
        def family(name: str, help_text: str, rows: Iterable[tuple[str, np.ndarray, np.ndarray]]) -> None:
            nonlocal n_series, n_samples
            base = name[: -len("_total")]
            f.write(f"# HELP {base} {help_text}\n# TYPE {base} counter\n")
            for labels, ts, vals in rows:
                tstr = _fmt_t(ts)
                f.write("".join(f"{name}{{{labels}}} {v:.6f} {t}\n" for v, t in zip(vals.tolist(), tstr)))
                n_series += 1
                n_samples += len(tstr)

        for tr in tracks:
            start_t = min(start_t, float(tr.timestamps[0]))
            end_t = max(end_t, float(tr.timestamps[-1]))

        family(
            REQUEST_METRIC,
            f"INVENTED demo scenario, {ORGANISATION}: HTTP requests served by the pod.",
            (
                (
                    f'namespace="{tr.service.namespace}",pod="{tr.pod}",workload="{tr.service.workload}"',
                    tr.timestamps,
                    tr.request_offset + np.cumsum(tr.rate * step_s),
                )
                for tr in tracks
            ),
        )

        def per_container(fn, *, limited_only: bool):
            for tr in tracks:
                for c in tr.service.containers:
                    if limited_only and c.limit_m is None:
                        continue
                    labels = f'container="{c.name}",namespace="{tr.service.namespace}",pod="{tr.pod}"'
                    yield labels, tr.timestamps, fn(tr, c.name)

        family(
            "container_cpu_usage_seconds_total",
            f"INVENTED demo scenario, {ORGANISATION}: cumulative CPU time consumed in seconds (cAdvisor name).",
            per_container(lambda tr, c: tr.cpu_offset[c] + np.cumsum(tr.cpu[c] * step_s), limited_only=False),
        )
        periods = CFS_PERIODS_PER_SECOND * step_s

        def cum_periods(tr, c):
            off = round(tr.cpu_offset[c] * 20)  # pods already running: some earlier periods
            return off + periods * np.arange(1, tr.timestamps.shape[0] + 1, dtype=float)

        def cum_throttled(tr, c):
            off = round(tr.cpu_offset[c] * 0.2)
            return off + np.cumsum(np.round(tr.throttled[c] * periods))

        family(
            "container_cpu_cfs_periods_total",
            f"INVENTED demo scenario, {ORGANISATION}: number of elapsed enforcement period intervals (cAdvisor name).",
            per_container(cum_periods, limited_only=True),
        )
        family(
            "container_cpu_cfs_throttled_periods_total",
            f"INVENTED demo scenario, {ORGANISATION}: number of throttled period intervals (cAdvisor name).",
            per_container(cum_throttled, limited_only=True),
        )
        f.write("# EOF\n")
    return HistoryInfo(path=p, start=start_t, end=end_t, step_s=float(step_s), series=n_series, samples=n_samples)
