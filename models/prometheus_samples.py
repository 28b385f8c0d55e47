"""Training samples from Prometheus: range queries for rate, CPU and throttling joined per pod.

``fetch_samples`` runs the rate query, the CPU query and (optionally) the throttle query
over one window and step with :meth:`PrometheusClient.query_range`, and joins the series on
the pod (``namespace`` + ``pod`` labels when both queries keep ``namespace``, else ``pod``)
and the timestamp. Only (pod, timestamp) pairs present in both rate and CPU answers are
kept; NaN values are passed through for the cleaning step to drop and count.
With a throttle query, a pod without throttle series (a container without a CPU limit has
no CFS series) gets ``throttled = 0.0``; without a throttle query ``throttled`` is None.
"""

from __future__ import annotations

from typing import NamedTuple, Sequence

import numpy as np

from ratefit.models.errors import PrometheusError
from ratefit.models.prometheus import PrometheusClient, RangeSeries

__all__ = ["PromSample", "fetch_samples", "join_series"]


class PromSample(NamedTuple):
    timestamp: float
    pod: str
    rate: float
    cpu: float
    throttled: float | None


def _pod_key(labels: dict[str, str], with_namespace: bool, query: str) -> tuple[str, str]:
    if "pod" not in labels:
        raise PrometheusError(
            f"query {query!r} answered a series without a 'pod' label ({dict(labels)}); "
            "aggregate with `sum by (namespace, pod) (…)` so rate and CPU can be joined per pod"
        )
    return (labels.get("namespace", "") if with_namespace else "", labels["pod"])


def _index(series: Sequence[RangeSeries], with_ns: bool, query: str) -> dict[tuple[str, str], dict[float, float]]:
    out: dict[tuple[str, str], dict[float, float]] = {}
    for s in series:
        k = _pod_key(dict(s.labels), with_ns, query)
        if k in out:
            raise PrometheusError(
                f"query {query!r} answered two series for pod {k[1]!r}; aggregate with "
                "`sum by (namespace, pod) (…)`"
            )
        out[k] = dict(zip(s.timestamps.tolist(), s.values.tolist()))
    return out


def join_series(
    rate: Sequence[RangeSeries],
    cpu: Sequence[RangeSeries],
    throttle: Sequence[RangeSeries] | None = None,
    *,
    rate_query: str = "rate query",
    cpu_query: str = "cpu query",
    throttle_query: str = "throttle query",
) -> list[PromSample]:
    """Join already-fetched series per pod and timestamp (see the module docstring)."""
    with_ns = all("namespace" in s.labels for s in [*rate, *cpu])
    r_idx = _index(rate, with_ns, rate_query)
    c_idx = _index(cpu, with_ns, cpu_query)
    t_idx = _index(throttle, with_ns, throttle_query) if throttle is not None else None
    out: list[PromSample] = []
    for k in sorted(r_idx.keys() & c_idx.keys()):
        rs, cs = r_idx[k], c_idx[k]
        ts_map = t_idx.get(k, {}) if t_idx is not None else None
        for t in sorted(rs.keys() & cs.keys()):
            th = None if ts_map is None else ts_map.get(t, 0.0)
            out.append(PromSample(t, k[1], rs[t], cs[t], th))
    out.sort(key=lambda s: (s.timestamp, s.pod))
    return out


def fetch_samples(
    client: PrometheusClient,
    *,
    rate_query: str,
    cpu_query: str,
    throttle_query: str | None = None,
    start: float,
    end: float,
    step: float,
) -> list[PromSample]:
    """Samples ``(timestamp, pod, rate, cpu, throttled)`` over [start, end] every ``step`` seconds."""
    rate = client.query_range(rate_query, start=start, end=end, step=step)
    cpu = client.query_range(cpu_query, start=start, end=end, step=step)
    thr = client.query_range(throttle_query, start=start, end=end, step=step) if throttle_query else None
    if thr is not None:
        # a 0/0 ratio (no periods in the window) is NaN: no evidence of throttling
        thr = [RangeSeries(s.labels, s.timestamps, np.where(np.isnan(s.values), 0.0, s.values)) for s in thr]
    return join_series(
        rate, cpu, thr,
        rate_query=rate_query, cpu_query=cpu_query, throttle_query=throttle_query or "",
    )
