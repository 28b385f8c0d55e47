"""Recent (rate, CPU) samples per container from Prometheus, for the staleness check.

For each container the controller sizes, two range queries over the last ``window``
(default 6 h) at ``step`` (default 5 m), joined per pod and timestamp
(``models.prometheus_samples.fetch_samples``):

* rate — the workload's per-pod request rate (the rate template's query for the workload,
  ``controller/workload_queries.normalised_rate_query``; a policy's own ``rateQuery`` when
  it has one, after the namespace guard);
* cpu — cAdvisor's ``container_cpu_usage_seconds_total`` rate per pod for that container
  (``workload_queries.cpu_query``).

The rate interval equals the step (``rate(…[5m])`` every 5 m): consecutive samples cover
disjoint windows, which the binomial test of ``controller/staleness`` assumes. At most
``max_containers`` containers are asked per call (the rest are answered "not checked this
pass"), so a pass's extra load on Prometheus is bounded: 2 × max_containers range queries,
each at most window/step + 1 points per pod.

Never raises for Prometheus trouble: a container without an answer gets a
:class:`UsageResult` with ``message`` and no samples (the check is skipped, nothing is
marked).
"""

from __future__ import annotations

import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from ratefit.controller.promql_guard import QueryGuard, QueryRefused
from ratefit.controller.stale_memo import JudgementMemo
from ratefit.controller.rate_template import RateTemplate
from ratefit.controller.workload_queries import cpu_query, normalised_rate_query
from ratefit.models.durations import parse_duration
from ratefit.models.errors import PrometheusError
from ratefit.models.prometheus import PrometheusClient
from ratefit.models.prometheus_samples import fetch_samples

__all__ = ["UsageRequest", "UsageResult", "PrometheusUsageSource", "DEFAULT_WINDOW", "DEFAULT_STEP"]

DEFAULT_WINDOW = "6h"
DEFAULT_STEP = "5m"


@dataclass(frozen=True, slots=True)
class UsageRequest:
    """One container whose recent usage is wanted (``key`` = namespace/policy/container)."""

    namespace: str
    policy: str
    workload_kind: str
    workload: str
    container: str
    rate_query: str | None = None

    @property
    def key(self) -> str:
        return f"{self.namespace}/{self.policy}/{self.container}"


@dataclass(frozen=True)
class UsageResult:
    """Paired samples (same pod, same step) of one container, oldest first."""

    key: str
    timestamps: np.ndarray = field(default_factory=lambda: np.zeros(0))
    rates: np.ndarray = field(default_factory=lambda: np.zeros(0))
    cpu: np.ndarray = field(default_factory=lambda: np.zeros(0))
    pods: tuple[str, ...] = ()
    #: why there are no samples ("" when there are)
    message: str = ""
    #: the source answered for this container (False: Prometheus trouble or the source's own
    #: cap — ask again next pass; True with no samples: there is nothing to judge)
    answered: bool = True

    @property
    def count(self) -> int:
        return int(self.rates.size)

    def since(self, t: float) -> UsageResult:
        """The samples at or after unix time ``t``."""
        keep = self.timestamps >= t
        return replace(self, timestamps=self.timestamps[keep], rates=self.rates[keep], cpu=self.cpu[keep],
                       pods=tuple(p for p, k in zip(self.pods, keep.tolist()) if k))


class PrometheusUsageSource:
    """Recent paired samples from a Prometheus server (client passed in)."""

    def __init__(
        self, client: PrometheusClient, *, template: RateTemplate = RateTemplate(), window: str = DEFAULT_WINDOW,
        step: str = DEFAULT_STEP, at: float | None = None, guard: QueryGuard = QueryGuard(),
        max_containers: int = 200, facts: ModelFacts | None = None, memo: JudgementMemo | None = None,
    ) -> None:
        #: what the models say about themselves (coverage, training image); None: defaults, no image check
        self.facts = facts
        #: the last judgement per container across passes (``controller/stale_memo``); None: judge all, every pass
        self.memo = memo
        self.window_s = parse_duration(window, field="staleness window")
        self.step_s = parse_duration(step, field="staleness step")
        if self.window_s < 2 * self.step_s:
            raise ValueError(f"staleness window {window} must span at least two steps of {step}")
        if max_containers < 1:
            raise ValueError("max_containers must be at least 1")
        self.client = client
        self.step = step
        self.at = at
        #: the template as given (its own rate interval), for retraining with the same counter
        self.rate_template = template
        self.guard = guard
        self.max_containers = max_containers
        # the rate interval equals the step: disjoint windows (see the module docstring)
        self.template = RateTemplate(
            metric=template.metric, namespace_label=template.namespace_label, workload_label=template.workload_label,
            pod_label=template.pod_label, interval=step, matchers=template.matchers)
        self.queries_sent = 0

    def queries(self, r: UsageRequest) -> tuple[str, str]:
        """(rate query, cpu query) of one container."""
        rate = r.rate_query if r.rate_query is not None else normalised_rate_query(
            self.template, r.namespace, r.workload_kind, r.workload)
        return rate, cpu_query(r.namespace, r.workload_kind, r.workload, r.container, interval=self.step)

    def usage(self, requests: Sequence[UsageRequest], *, end: float | None = None,
              window_s: float | None = None) -> dict[str, UsageResult]:
        """Samples over [end − window, end] (end: ``at``, else now) for each request."""
        import time

        end = end if end is not None else (self.at if self.at is not None else time.time())
        start = end - (window_s if window_s is not None else self.window_s)
        out: dict[str, UsageResult] = {}
        for i, r in enumerate(requests):
            if i >= self.max_containers:
                out[r.key] = UsageResult(key=r.key, answered=False,
                                         message=f"not checked this pass (more than {self.max_containers} containers)")
                continue
            out[r.key] = self._one(r, start, end)
        return out

    def _one(self, r: UsageRequest, start: float, end: float) -> UsageResult:
        rate_q, cpu_q = self.queries(r)
        if r.rate_query is not None:
            try:
                self.guard.check(rate_q, r.namespace)
            except QueryRefused as exc:
                return UsageResult(key=r.key, message=str(exc))
        self.queries_sent += 2
        try:
            rows = fetch_samples(self.client, rate_query=rate_q, cpu_query=cpu_q, start=start, end=end, step=self.step_s)
        except PrometheusError as exc:
            return UsageResult(key=r.key, message=f"recent usage of {r.key}: {exc}", answered=False)
        rows = [s for s in rows if np.isfinite(s.rate) and np.isfinite(s.cpu)]
        if not rows:
            return UsageResult(key=r.key, message=f"no recent (rate, CPU) samples for {r.key} over the window")
        return UsageResult(
            key=r.key, timestamps=np.array([s.timestamp for s in rows]), rates=np.array([s.rate for s in rows]),
            cpu=np.array([s.cpu for s in rows]), pods=tuple(s.pod for s in rows))


def usage_by_key(results: Mapping[str, UsageResult]) -> dict[str, UsageResult]:
    """Only the results that carry samples."""
    return {k: v for k, v in results.items() if v.count}


class ModelFacts:
    """What each model says about itself that the staleness check needs — its band's
    coverage and the image it was trained on — read from the sizing API's model detail
    (``GET /v1/models/{key}``: ``coverage``, ``image``, ``version``) and cached per key for
    ``ttl_s`` seconds (the detail changes only when the model is retrained), so a pass asks
    at most once per model per ``ttl_s``. A model the API cannot describe gets no facts
    (default coverage, no image check)."""

    def __init__(self, sizing: object, *, ttl_s: float = 600.0, max_keys: int = 100_000) -> None:
        import time

        self.sizing = sizing
        self.ttl_s = ttl_s
        self.max_keys = max_keys
        self._clock = time.monotonic
        self._cache: dict[str, tuple[float, float | None, str | None, str | None]] = {}
        self._lock = threading.Lock()

    def lookup(self, keys: Sequence[str], *, fetch: bool = True,
               via: object | None = None) -> dict[str, tuple[float | None, str | None]]:
        """key → (coverage or None, image or None). ``fetch=False``: only what is cached
        (also past its ttl; an unknown key gets no facts) — no request, for a pass that
        must not wait. ``via``: the sizing client to ask instead of the one given at
        construction (a thread of its own uses its own client)."""
        from ratefit.models.errors import RatefitError

        client = via if via is not None else self.sizing
        now = self._clock()
        out: dict[str, tuple[float | None, str | None]] = {}
        for key in dict.fromkeys(keys):
            with self._lock:
                hit = self._cache.get(key)
            if fetch and (hit is None or now - hit[0] > self.ttl_s):
                try:
                    # the sizing client's one call path (bounded, token, errors translated)
                    body = client._call("GET", f"/v1/models/{key}")  # type: ignore[attr-defined]
                except (RatefitError, AttributeError):
                    body = None
                cov = body.get("coverage") if isinstance(body, dict) else None
                img = body.get("image") if isinstance(body, dict) else None
                ver = body.get("version") if isinstance(body, dict) else None
                hit = (now, float(cov) if isinstance(cov, (int, float)) and 0 < cov < 1 else None,
                       img if isinstance(img, str) and img else None, ver if isinstance(ver, str) and ver else None)
                with self._lock:
                    if len(self._cache) >= self.max_keys:
                        self._cache.clear()
                    self._cache[key] = hit
            out[key] = (hit[1], hit[2]) if hit is not None else (None, None)
        return out

    def version(self, key: str) -> str | None:
        """The version of ``key`` as last read by :meth:`lookup` (None: unknown)."""
        with self._lock:
            hit = self._cache.get(key)
        return hit[3] if hit is not None else None
