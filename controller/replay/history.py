"""The history a replay reads: per-pod counter series of requests and CPU.

Two sources, one shape (:class:`History`):

* an OpenMetrics file with timestamps (:func:`read_openmetrics`, the format the demo
  scenario writes and ``promtool tsdb create-blocks-from openmetrics`` loads);
* a Prometheus server (:func:`read_prometheus`): the raw samples of the same counters,
  fetched as range selectors (``metric{…}[1d]``) evaluated at the end of each day of the
  window, so what comes back are the stored samples, not resampled values.

Series kept:

* the request counter (the rate template's metric, labels namespace and pod):
  ``requests[(namespace, pod)]`` — a list, several series of one pod are summed later the
  way ``sum by (namespace, pod)`` does; pods are assigned to workloads by their names, as
  the live loop does (``controller/pod_names.PodAssigner``);
* the cAdvisor CPU counter ``container_cpu_usage_seconds_total`` (labels
  namespace/pod/container; the pod-level series with ``container=""`` is dropped to avoid
  double counting — DESIGN.md "cAdvisor series"): ``cpu[(namespace, pod, container)]``.

Nothing here decides anything; the replay computes rates and usage from these arrays
(``controller/replay/series.py``) using only samples up to each simulated time.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ratefit.controller.metrics_source import read_counter_series
from ratefit.models.errors import InputError, PrometheusError

__all__ = ["CPU_METRIC", "Counter", "History", "read_openmetrics", "read_prometheus", "custom_rates"]

CPU_METRIC = "container_cpu_usage_seconds_total"

#: (timestamps in unix seconds, counter values), both 1-D and sorted by time
Counter = tuple[np.ndarray, np.ndarray]


@dataclass(frozen=True)
class History:
    """Counter series by pod. ``start``/``end``: first and last sample time seen."""

    requests: Mapping[tuple[str, str], Sequence[Counter]]  # (namespace, pod)
    cpu: Mapping[tuple[str, str, str], Sequence[Counter]]  # (namespace, pod, container)
    start: float
    end: float
    source: str = ""

    @classmethod
    def build(cls, requests: Mapping[tuple[str, str], Sequence[Counter]],
              cpu: Mapping[tuple[str, str, str], Sequence[Counter]], *, source: str = "") -> History:
        ts = [s[0] for group in (*requests.values(), *cpu.values()) for s in group if len(s[0])]
        if not ts:
            raise InputError(f"{source or 'the history'} holds no samples of the request or CPU counters")
        start = min(float(t[0]) for t in ts)
        end = max(float(t[-1]) for t in ts)
        return cls(requests=dict(requests), cpu=dict(cpu), start=start, end=end, source=source)

    def truncated(self, at: float) -> History:
        """The same history holding only samples at or before ``at`` (for tests)."""
        def cut(group: Sequence[Counter]) -> list[Counter]:
            out = []
            for ts, vs in group:
                n = int(np.searchsorted(ts, at, side="right"))
                if n:
                    out.append((ts[:n], vs[:n]))
            return out
        req = {k: c for k, g in self.requests.items() if (c := cut(g))}
        cpu = {k: c for k, g in self.cpu.items() if (c := cut(g))}
        return History.build(req, cpu, source=self.source)

    def pods_by_workload(self, assigner) -> dict[tuple[str, str | None, str], list[str]]:
        """(namespace, kind, name) → its pods (sorted), from every pod seen in either counter,
        assigned by name with the live loop's ``PodAssigner`` (the longer workload name wins)."""
        out: dict[tuple[str, str | None, str], set[str]] = {}
        seen = {(ns, pod) for (ns, pod) in self.requests} | {(ns, pod) for (ns, pod, _c) in self.cpu}
        for ns, pod in seen:
            w = assigner.workload_of(ns, pod)
            if w is not None:
                out.setdefault((w.namespace, w.kind, w.name), set()).add(pod)
        return {k: sorted(v) for k, v in out.items()}


def _by_pod(series: Mapping[tuple[tuple[str, str], ...], Counter], keys: tuple[str, ...],
            *, drop_empty: str | None = None) -> dict[tuple[str, ...], list[Counter]]:
    out: dict[tuple[str, ...], list[Counter]] = {}
    for labels, (ts, vs) in series.items():
        lab = dict(labels)
        if drop_empty is not None and not lab.get(drop_empty):
            continue
        if any(k not in lab for k in keys):
            continue
        ok = np.isfinite(ts) & np.isfinite(vs)
        out.setdefault(tuple(lab[k] for k in keys), []).append((ts[ok], vs[ok]))
    return out


def read_openmetrics(path: str | Path, *, request_metric: str, cpu_metric: str = CPU_METRIC,
                     namespaces: Iterable[str] | None = None) -> History:
    """Read the request and CPU counters from an OpenMetrics file with timestamps."""
    p = Path(path)
    if not p.is_file():
        raise InputError(f"--history {p}: no such file")
    want = set(namespaces) if namespaces else None
    req = _by_pod(read_counter_series(p, request_metric), ("namespace", "pod"))
    cpu = _by_pod(read_counter_series(p, cpu_metric), ("namespace", "pod", "container"), drop_empty="container")
    if want is not None:
        req = {k: v for k, v in req.items() if k[0] in want}
        cpu = {k: v for k, v in cpu.items() if k[0] in want}
    if not req:
        raise InputError(f"{p} holds no samples of {request_metric} with labels namespace and pod; "
                         "check --rate-metric")
    if not cpu:
        raise InputError(f"{p} holds no samples of {cpu_metric} with labels namespace, pod, container")
    return History.build(req, cpu, source=str(p))  # type: ignore[arg-type]


def _ns_matcher(namespaces: Iterable[str]) -> str:
    from ratefit.controller.metrics_source import _regex_literal

    alts = "|".join(_regex_literal(ns) for ns in sorted(set(namespaces)))
    return f'namespace=~"{alts}"'


def read_prometheus(client, *, start: float, end: float, request_metric: str, namespaces: Iterable[str],
                    cpu_metric: str = CPU_METRIC, chunk_s: float = 86400.0) -> History:
    """The raw samples of both counters in [start, end] from a Prometheus server, fetched
    in chunks of ``chunk_s`` as range selectors (``metric{namespace=~…}[chunk]`` at the
    chunk's end) and stitched (a sample on a chunk edge is kept once)."""
    if not (math.isfinite(start) and math.isfinite(end)) or end <= start:
        raise InputError(f"--from/--to: the window [{start}, {end}] is empty; --to must be after --from")
    ns = _ns_matcher(namespaces)
    parts: dict[str, dict[tuple[tuple[str, str], ...], tuple[list[np.ndarray], list[np.ndarray]]]] = {
        request_metric: {}, cpu_metric: {}}
    t = start
    while t < end:
        t_end = min(end, t + chunk_s)
        width = max(1, int(math.ceil(t_end - t)))
        for metric in (request_metric, cpu_metric):
            try:
                got = client.query_matrix(f"{metric}{{{ns}}}[{width}s]", at=t_end)
            except PrometheusError as exc:
                raise InputError(f"cannot read {metric} from Prometheus: {exc}") from exc
            for s in got:
                key = tuple(sorted(s.labels.items()))
                slot = parts[metric].setdefault(key, ([], []))
                slot[0].append(np.asarray(s.timestamps, dtype=float))
                slot[1].append(np.asarray(s.values, dtype=float))
        t = t_end
    merged: dict[str, dict[tuple[tuple[str, str], ...], Counter]] = {}
    for metric, series in parts.items():
        merged[metric] = {}
        for key, (tl, vl) in series.items():
            ts, vs = np.concatenate(tl), np.concatenate(vl)
            order = np.argsort(ts, kind="stable")
            ts, vs = ts[order], vs[order]
            keep = np.concatenate([[True], np.diff(ts) > 0])
            merged[metric][key] = (ts[keep], vs[keep])
    req = _by_pod(merged[request_metric], ("namespace", "pod"))
    cpu = _by_pod(merged[cpu_metric], ("namespace", "pod", "container"), drop_empty="container")
    if not req:
        raise InputError(f"Prometheus has no samples of {request_metric} in the window; check --rate-metric and --from/--to")
    if not cpu:
        raise InputError(f"Prometheus has no samples of {cpu_metric} in the window")
    return History.build(req, cpu, source="prometheus")  # type: ignore[arg-type]


def custom_rates(client, requests, pass_times: np.ndarray, *, rate_step: str) -> dict[tuple[str, str], np.ndarray]:
    """For policies with their own ``rateQuery``: the query the live loop sends
    (``metrics_source.custom_query``), evaluated by Prometheus at every pass time with a
    range query; per pass the busiest pod's value, NaN where none. ``requests``: pairs of
    ((policy key, container), ``metrics_source.RateRequest``)."""
    from ratefit.controller.metrics_source import custom_query
    from ratefit.controller.promql_guard import QueryGuard, QueryRefused

    guard = QueryGuard()  # the live loop's rules: a policy's query stays inside its namespace
    out: dict[tuple[str, str], np.ndarray] = {}
    times = np.asarray(pass_times, dtype=float)
    step = float(times[1] - times[0]) if len(times) > 1 else 60.0
    for key, req in requests:
        best = np.full(len(times), np.nan)
        q = custom_query(req, step=rate_step)
        try:
            guard.check(q, req.namespace)
        except QueryRefused:
            out[key] = best  # refused as the live loop refuses it: no rate (QueryRefused there)
            continue
        try:
            got = client.query_range(q, start=float(times[0]), end=float(times[-1]), step=step)
        except PrometheusError as exc:
            raise InputError(f"rateQuery of {key[0]}/{key[1]}: {exc}") from exc
        for s in got:
            idx = np.searchsorted(times, np.asarray(s.timestamps, dtype=float) - 1e-6)
            ok = (idx < len(times)) & np.isfinite(s.values)
            idx, vals = idx[ok], np.asarray(s.values, dtype=float)[ok]
            best[idx] = np.fmax(best[idx], vals)
        out[key] = best
    return out
