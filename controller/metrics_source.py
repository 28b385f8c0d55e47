"""Per-pod request rates for the reconcile loop: from Prometheus, or replayed from a history file.

One pass asks for the rates of every (policy, container) at once with
:meth:`PrometheusRateSource.per_pod_rates`. What it sends (``W`` = the policy's
``rateWindow``, ``φ`` = ``ratePercentile``/100, ``S`` = the source's ``step``, ``R`` = the
template's rate interval, ``M`` = the template's request counter):

* Every request whose policy has no ``rateQuery`` follows the **default template** and
  is answered by ONE instant query per pass. The counter needs only ``namespace`` and
  ``pod`` labels: the controller maps pods to workloads by their names
  (``controller/pod_names``: one anchored regex per workload from its kind and name). For a
  single (W, φ) group::

      quantile_over_time(φ, sum by (namespace, pod) (rate(M{namespace=~"ns1|ns2",pod=~"RX"}[R]))[W:S])

  where ``RX`` is the alternation of the wanted workloads' pod-name regexes, i.e. per pod,
  the φ-quantile of its request rate sampled every S over the last W (a subquery;
  Prometheus docs "Subquery", ``quantile_over_time``). Policies with other (W, φ) pairs are
  added to the same query with ``or``, each part tagged by
  ``label_replace(…, "ratefit_group", "<i>", "", "")`` so the parts never collide. The
  answer is split per (namespace, workload) on the client, by the same regexes (a pod
  matching two workloads goes to the longer name). The template's label names, counter
  and fixed matchers come from a preset (``controller/rate_presets``); a template with a
  ``workload_label`` (a counter that carries one) sums by (namespace, workload, pod) and
  matches that label instead.
* A request with its own ``rateQuery`` Q (which must answer one series per pod) is
  sent on its own: ``quantile_over_time(φ, (Q\\n)[W:S])``; before it is sent the whole
  expression passes the :class:`~ratefit.controller.promql_guard.QueryGuard` (every selector
  limited to the policy's namespace, unless raw queries are allowed).

Result per request (:class:`RateResult`): ``pod_rates`` — pod → φ-quantile of that pod's
rate over W; ``rate`` — the largest of them (the request applies to every pod, so the
busiest pod decides); or ``rate=None`` with ``why`` saying why and ``message`` the text
for the policy's status (the query is in ``query``):

* ``NoMetrics`` — Prometheus down, slow, answering garbage, or no series for the workload;
* ``QueryRefused`` — the policy's rateQuery may not be sent (it reaches outside the
  policy's namespace, or it is not PromQL); nothing was sent;
* ``QueryFailed`` — Prometheus refused the query (a PromQL error: 400/422), its error text
  in the message;
* ``TooManySeries`` — the query answered more series than the cap (default 500): the
  container is held, the largest value is NOT used.

:class:`ReplayRateSource` computes the same numbers offline from an OpenMetrics history
file (the demo scenario's format): Prometheus' ``rate()`` extrapolation, the subquery's
step-aligned evaluation times and ``quantile_over_time``'s interpolation are reproduced
(from memory of Prometheus 2.x ``extrapolatedRate`` and the subquery alignment; checked
against the real server in ``tests/test_metrics_source.py``).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Protocol, Sequence

import numpy as np

from ratefit.controller.pod_names import PodAssigner, WorkloadRef, pod_name_regex
from ratefit.controller.promql_guard import QueryGuard, QueryRefused
from ratefit.controller.rate_template import RateTemplate, _regex_literal  # noqa: F401 (re-exported)
from ratefit.models.durations import format_duration, parse_duration
from ratefit.models.errors import InputError, PrometheusError, PromQLError
from ratefit.models.prometheus import PrometheusClient, RangeSeries

__all__ = [
    "NO_METRICS",
    "QUERY_REFUSED",
    "QUERY_FAILED",
    "TOO_MANY_SERIES",
    "RATE_REASONS",
    "RateRequest",
    "RateResult",
    "RateTemplate",
    "RateSource",
    "PrometheusRateSource",
    "ReplayRateSource",
    "grouped_query",
    "custom_query",
]

NO_METRICS = "NoMetrics"
QUERY_REFUSED = "QueryRefused"
QUERY_FAILED = "QueryFailed"
TOO_MANY_SERIES = "TooManySeries"
#: every ``RateResult.why`` a source may give (the held reasons of the observe stage)
RATE_REASONS = (NO_METRICS, QUERY_REFUSED, QUERY_FAILED, TOO_MANY_SERIES)
GROUP_LABEL = "ratefit_group"


@dataclass(frozen=True, slots=True)
class RateRequest:
    """What one (policy, container) needs: its workload's per-pod rate over ``rate_window``.

    ``percentile`` is on the 0–100 scale (95 = p95). ``query`` None means the default template.
    ``workload_kind`` (Deployment | StatefulSet) picks the pod-name pattern; None accepts
    the names of either kind.
    """

    namespace: str
    policy: str
    workload: str
    container: str
    query: str | None = None
    rate_window: str = "1h"
    percentile: float = 95.0
    workload_kind: str | None = None

    @property
    def key(self) -> str:
        """``namespace/policy/container`` — the key of the answer."""
        return f"{self.namespace}/{self.policy}/{self.container}"

    @property
    def workload_ref(self) -> WorkloadRef:
        return WorkloadRef(self.namespace, self.workload_kind, self.workload)

    def window_s(self) -> float:
        return parse_duration(self.rate_window, field=f"{self.key}: rateWindow")

    def phi(self) -> float:
        p = float(self.percentile)
        if not (0.0 <= p <= 100.0) or math.isnan(p):
            raise InputError(f"{self.key}: ratePercentile must be within 0..100, got {self.percentile!r}")
        return p / 100.0


@dataclass(frozen=True, slots=True)
class RateResult:
    """The answer for one request: a rate, or why there is none (``why``, one of
    :data:`RATE_REASONS`, and ``message`` for the policy's status)."""

    key: str
    rate: float | None
    pod_rates: Mapping[str, float] = field(default_factory=dict)
    why: str | None = None
    message: str = ""
    query: str = ""

    @property
    def missing(self) -> bool:
        return self.rate is None

    @property
    def reason(self) -> str | None:
        """Alias of ``why``: the held reason when there is no rate."""
        return self.why

    def status_message(self, limit: int = 1024) -> str:
        """The message for the policy's status when there is no rate: why, then the query
        that was (or would have been) sent, cut to ``limit`` characters."""
        text = self.message or "no usable per-pod request rate"
        if self.query:
            text += " — query: " + " ".join(self.query.split())
        return text if len(text) <= limit else text[: limit - 1] + "…"


class RateSource(Protocol):
    def per_pod_rates(self, requests: Sequence[RateRequest]) -> dict[str, RateResult]: ...


def _missing(req: RateRequest, message: str, query: str = "", why: str = NO_METRICS) -> RateResult:
    return RateResult(key=req.key, rate=None, why=why, message=message, query=query)


def _result(req: RateRequest, pods: Mapping[str, float], query: str, empty_msg: str,
            max_series: int = 0) -> RateResult:
    if max_series > 0 and len(pods) > max_series:
        return _too_many(req, len(pods), max_series, query)
    clean = {p: float(v) for p, v in pods.items() if math.isfinite(v)}
    if not clean:
        return _missing(req, empty_msg, query)
    return RateResult(key=req.key, rate=max(clean.values()), pod_rates=clean, query=query)


def _too_many(req: RateRequest, count: int, cap: int, query: str) -> RateResult:
    return _missing(
        req, f"the rate query answered {count} series, more than the cap of {cap} per container; "
             "narrow it to the workload's pods (one series per pod) or raise --max-rate-series",
        query, TOO_MANY_SERIES)


def _failed(req: RateRequest, exc: PrometheusError, query: str) -> RateResult:
    """A Prometheus error as the request's answer: a refused query is QueryFailed (it will
    fail again until someone fixes it), anything else NoMetrics (temporary)."""
    if isinstance(exc, PromQLError):
        return _missing(req, str(exc), query, QUERY_FAILED)  # "Prometheus refused query … (HTTP 422 …): why"
    return _missing(req, str(exc), query)


def _groups(requests: Sequence[RateRequest]) -> list[tuple[float, float, list[RateRequest]]]:
    """Default-template requests grouped by (window seconds, φ), in first-seen order."""
    groups: dict[tuple[float, float], list[RateRequest]] = {}
    for r in requests:
        groups.setdefault((r.window_s(), r.phi()), []).append(r)
    return [(w, phi, reqs) for (w, phi), reqs in groups.items()]


def _phi_text(phi: float) -> str:
    return repr(float(phi))


def grouped_query(
    groups: Sequence[tuple[float, float, Sequence[RateRequest]]], *, template: RateTemplate, step: str
) -> str:
    """The one PromQL expression for all default-template requests (see the module docstring)."""
    parts = []
    for i, (window_s, phi, reqs) in enumerate(groups):
        inner = template.inner([r.namespace for r in reqs], [r.workload_ref for r in reqs])
        expr = f"quantile_over_time({_phi_text(phi)}, {inner}[{format_duration(window_s)}:{step}])"
        if len(groups) > 1:
            expr = f'label_replace({expr}, "{GROUP_LABEL}", "{i}", "", "")'
        parts.append(expr)
    return " or ".join(parts)


def custom_query(req: RateRequest, *, step: str) -> str:
    """The PromQL sent for a request with its own ``rateQuery`` (the newline ends a
    trailing ``#`` comment of the policy's text before the wrapper's parenthesis)."""
    return f"quantile_over_time({_phi_text(req.phi())}, ({req.query}\n)[{format_duration(req.window_s())}:{step}])"


def _pod_name(labels: Mapping[str, str], pod_label: str) -> str:
    if pod_label in labels:
        return labels[pod_label]
    return "{" + ",".join(f'{k}="{v}"' for k, v in sorted(labels.items()) if k != GROUP_LABEL) + "}"


def _validate(requests: Sequence[RateRequest]) -> tuple[list[RateRequest], dict[str, RateResult]]:
    ok, bad = [], {}
    for r in requests:
        try:
            r.window_s()
            r.phi()
            if r.query is None and r.workload_kind is not None:
                pod_name_regex(r.workload_kind, r.workload)
        except (InputError, ValueError) as e:
            bad[r.key] = _missing(r, str(e))
        else:
            ok.append(r)
    return ok, bad


def _no_series_message(t: RateTemplate, r: RateRequest, where: str) -> str:
    if t.workload_label:
        who = f"{t.workload_label}={r.workload!r}"
    else:
        who = f"pods named like {r.workload_kind or 'Deployment or StatefulSet'} {r.workload!r} ({pod_name_regex(r.workload_kind, r.workload)})"
    return (f"no series of {t.metric} with {t.namespace_label}={r.namespace!r} and {who} over the last "
            f"{r.rate_window} ({where}); check the workload is instrumented and scraped with "
            f"{t.namespace_label} and {t.pod_label} labels, or pick a --rate-preset that matches its counter")


class PrometheusRateSource:
    """Rates from a Prometheus server through :class:`PrometheusClient` (passed in).

    ``at`` fixes the evaluation time (unix s; None: the server's now). ``step`` is the
    subquery resolution. ``guard`` holds the rules for policies' own queries (namespace
    boundary, series cap; see ``controller/promql_guard``). Never raises for Prometheus
    trouble: every request gets a :class:`RateResult`, with ``why`` when there is no rate.
    """

    def __init__(
        self,
        client: PrometheusClient,
        *,
        at: float | None = None,
        template: RateTemplate = RateTemplate(),
        step: str = "30s",
        guard: QueryGuard = QueryGuard(),
    ) -> None:
        parse_duration(step, field="rate step")
        self.client = client
        self.at = at
        self.template = template
        self.step = step
        self.guard = guard
        self.queries_sent = 0  # for telemetry and tests: instant queries sent by this source

    def per_pod_rates(self, requests: Sequence[RateRequest]) -> dict[str, RateResult]:
        ok, out = _validate(requests)
        default = [r for r in ok if r.query is None]
        custom = [r for r in ok if r.query is not None]
        if default:
            out.update(self._default(default))
        for r in custom:
            out[r.key] = self._custom(r)
        return out

    def query_for(self, r: RateRequest) -> str:
        """The PromQL that answers ``r`` (for the review and ``ratefit check``): its own
        wrapped rateQuery, or the default template's query for its workload alone."""
        if r.query is not None:
            return custom_query(r, step=self.step)
        return grouped_query([(r.window_s(), r.phi(), [r])], template=self.template, step=self.step)

    def _default(self, requests: list[RateRequest]) -> dict[str, RateResult]:
        groups = _groups(requests)
        q = grouped_query(groups, template=self.template, step=self.step)
        self.queries_sent += 1
        try:
            samples = self.client.query(q, at=self.at)
        except PrometheusError as e:
            return {r.key: _failed(r, e, q) for r in requests}
        t = self.template
        # (group index, namespace) -> pod -> value; (group, namespace, workload) -> pod -> value
        by: dict[tuple[int, str, str], dict[str, float]] = {}
        raw: dict[tuple[int, str], dict[str, float]] = {}
        for s in samples:
            g = int(s.labels.get(GROUP_LABEL, "0")) if len(groups) > 1 else 0
            ns = s.labels.get(t.namespace_label, "")
            pod = _pod_name(s.labels, t.pod_label)
            if t.workload_label:
                by.setdefault((g, ns, s.labels.get(t.workload_label, "")), {})[pod] = s.value
            else:
                raw.setdefault((g, ns), {})[pod] = s.value
        refs: dict[tuple[int, str, str], dict[str, float]] = {}
        if not t.workload_label:
            for g, (_w, _phi, reqs) in enumerate(groups):
                assigner = PodAssigner(r.workload_ref for r in reqs)
                for ns in {r.namespace for r in reqs}:
                    for ref, pods in assigner.split(ns, raw.get((g, ns), {})).items():
                        refs[(g, ns, f"{ref.kind}/{ref.name}")] = pods
        out = {}
        for g, (_w, _phi, reqs) in enumerate(groups):
            for r in reqs:
                if t.workload_label:
                    pods = by.get((g, r.namespace, r.workload), {})
                else:
                    pods = refs.get((g, r.namespace, f"{r.workload_kind}/{r.workload}"), {})
                out[r.key] = _result(r, pods, q, _no_series_message(t, r, f"Prometheus at {self.client.base_url}"),
                                     self.guard.max_series)
        return out

    def _custom(self, r: RateRequest) -> RateResult:
        q = custom_query(r, step=self.step)
        try:
            self.guard.check(q, r.namespace)
        except QueryRefused as e:
            return _missing(r, str(e), r.query or "", QUERY_REFUSED)
        self.queries_sent += 1
        try:
            samples = self.client.query(q, at=self.at)
        except PrometheusError as e:
            return _failed(r, e, q)
        if self.guard.too_many(len(samples)):  # every series counts, also those without a pod label
            return _too_many(r, len(samples), self.guard.max_series, q)
        pods = {_pod_name(s.labels, self.template.pod_label): s.value for s in samples}
        return _result(r, pods, q, f"rateQuery of {r.key} answered no series over the last {r.rate_window}")


# --------------------------------------------------------------------------------------
# Replay: the same numbers from an OpenMetrics history file, no Prometheus needed.

_LABEL = re.compile(r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"')


def _unescape(v: str) -> str:
    return v.replace('\\"', '"').replace("\\n", "\n").replace("\\\\", "\\") if "\\" in v else v


def read_counter_series(path: str | Path, metric: str) -> dict[tuple[tuple[str, str], ...], tuple[np.ndarray, np.ndarray]]:
    """The samples of one counter (sample name ``metric``, e.g. ``…_total``) in an OpenMetrics
    file with timestamps: ``{sorted label items: (timestamps s, values)}``."""
    series: dict[tuple[tuple[str, str], ...], tuple[list[float], list[float]]] = {}
    prefix_b = metric + "{"
    p = Path(path)
    try:
        f = open(p)
    except OSError as e:
        raise InputError(f"cannot read rate history {p}: {e}") from e
    with f:
        for lineno, line in enumerate(f, 1):
            if not (line.startswith(prefix_b) or line.startswith(metric + " ")):
                continue
            try:
                if line.startswith(prefix_b):
                    close = line.rindex("}")
                    labels = tuple(sorted((k, _unescape(v)) for k, v in _LABEL.findall(line[len(prefix_b):close])))
                    rest = line[close + 1:].split()
                else:
                    labels = ()
                    rest = line[len(metric):].split()
                value, ts = float(rest[0]), float(rest[1])
            except (ValueError, IndexError) as e:
                raise InputError(
                    f"{p}:{lineno}: cannot read a sample of {metric} with a timestamp ({line.strip()[:120]!r})"
                ) from e
            tl, vl = series.setdefault(labels, ([], []))
            tl.append(ts)
            vl.append(value)
    out = {}
    for k, (tl, vl) in series.items():
        ts, vs = np.asarray(tl), np.asarray(vl)
        order = np.argsort(ts, kind="stable")
        out[k] = (ts[order], vs[order])
    return out


def extrapolated_rate(ts: np.ndarray, vs: np.ndarray, eval_t: np.ndarray, range_s: float) -> np.ndarray:
    """``rate(counter[range_s])`` at each of ``eval_t`` as Prometheus 2.x computes it
    (samples in [t − range, t], counter resets corrected, extrapolation to the window
    edges up to 1.1× the mean sample spacing, not below zero). NaN where < 2 samples."""
    ts_ms = np.round(ts * 1000).astype(np.int64)
    ev_ms = np.round(eval_t * 1000).astype(np.int64)
    r_ms = int(round(range_s * 1000))
    lo = np.searchsorted(ts_ms, ev_ms - r_ms, side="left")
    hi = np.searchsorted(ts_ms, ev_ms, side="right") - 1
    out = np.full(ev_ms.shape, np.nan)
    ok = hi - lo >= 1
    if not ok.any():
        return out
    drops = np.concatenate([[0.0], np.where(np.diff(vs) < 0, vs[:-1], 0.0)])
    corrected = vs + np.cumsum(drops)
    lo, hi, ev = lo[ok], hi[ok], ev_ms[ok]
    first_v = vs[lo]
    result = corrected[hi] - corrected[lo]
    to_start = (ts_ms[lo] - (ev - r_ms)) / 1000.0
    to_end = (ev - ts_ms[hi]) / 1000.0
    sampled = (ts_ms[hi] - ts_ms[lo]) / 1000.0
    avg = sampled / (hi - lo)
    with np.errstate(divide="ignore", invalid="ignore"):
        to_zero = np.where((result > 0) & (first_v >= 0), sampled * (first_v / result), np.inf)
    to_start = np.minimum(to_start, to_zero)
    thr = avg * 1.1
    interval = sampled + np.where(to_start < thr, to_start, avg / 2) + np.where(to_end < thr, to_end, avg / 2)
    out[ok] = result * (interval / sampled) / range_s
    return out


def subquery_times(at: float, window_s: float, step_s: float) -> np.ndarray:
    """Evaluation times of ``expr[window:step]`` at ``at``: multiples of step in [at − window, at]."""
    at_ms, w_ms, s_ms = int(round(at * 1000)), int(round(window_s * 1000)), int(round(step_s * 1000))
    start = s_ms * ((at_ms - w_ms) // s_ms)
    if start < at_ms - w_ms:
        start += s_ms
    return np.arange(start, at_ms + 1, s_ms, dtype=np.int64) / 1000.0


class ReplayRateSource:
    """Rates computed from an OpenMetrics history file, as :class:`PrometheusRateSource` would
    get them from a Prometheus holding that history. ``at`` defaults to the file's last sample.
    Only the default template can be replayed: a policy with its own ``rateQuery`` is
    answered NoMetrics (say so in the review)."""

    def __init__(
        self,
        path: str | Path,
        *,
        at: float | None = None,
        template: RateTemplate = RateTemplate(),
        step: str = "30s",
    ) -> None:
        self.path = Path(path)
        self.template = template
        self.step = step
        self.step_s = parse_duration(step, field="rate step")
        self.interval_s = parse_duration(template.interval, field="rate interval")
        self._series = read_counter_series(self.path, template.metric)
        last = max((float(ts[-1]) for ts, _ in self._series.values() if len(ts)), default=None)
        self.at = at if at is not None else last

    def per_pod_rates(self, requests: Sequence[RateRequest]) -> dict[str, RateResult]:
        ok, out = _validate(requests)
        t = self.template
        assigner = PodAssigner(r.workload_ref for r in ok if r.query is None)
        for r in ok:
            if r.query is not None:
                out[r.key] = _missing(r, f"{r.key} has its own rateQuery; replay ({self.path}) evaluates only the default template")
                continue
            if self.at is None:
                out[r.key] = _missing(r, f"{self.path} holds no samples of {t.metric}")
                continue
            ev = subquery_times(self.at, r.window_s(), self.step_s)
            per_pod: dict[str, np.ndarray] = {}
            for labels, (ts, vs) in self._series.items():
                lab = dict(labels)
                if lab.get(t.namespace_label) != r.namespace or any(lab.get(k) != v for k, v in t.matchers):
                    continue
                if t.workload_label:
                    if lab.get(t.workload_label) != r.workload:
                        continue
                elif assigner.workload_of(r.namespace, lab.get(t.pod_label, "")) != r.workload_ref:
                    continue
                rates = extrapolated_rate(ts, vs, ev, self.interval_s)
                pod = lab.get(t.pod_label, "")
                prev = per_pod.get(pod)
                # sum by (…, pod): add where both have a value, keep whichever exists otherwise
                per_pod[pod] = rates if prev is None else np.where(np.isnan(prev), rates, np.where(np.isnan(rates), prev, prev + rates))
            pods = {}
            for pod, vals in per_pod.items():
                v = vals[~np.isnan(vals)]
                if v.size:
                    pods[pod] = float(np.percentile(v, r.phi() * 100.0))
            out[r.key] = _result(
                r, pods, f"replay:{self.path}",
                _no_series_message(t, r, f"within {r.rate_window} before {self.at} in {self.path}"),
            )
        return out
