"""The controller's own telemetry: Prometheus metrics, ``/healthz`` and ``/readyz``.

Everything is registered on a :class:`prometheus_client.CollectorRegistry` owned by
one :class:`Telemetry` object (never the process-global registry), so tests and two
controllers in one process do not share counters. :class:`HealthServer` serves the
three routes on a small bounded stdlib HTTP server (``bounded_http``: a connection cap,
header deadline and size limits; no framework needed for three GET routes; it keeps
answering while the reconcile loop is busy or on standby):

- ``/metrics`` — the Prometheus text exposition format (``prometheus_client`` renders it);
- ``/healthz`` — 200 while the loop thread is alive (liveness: restart me if not);
- ``/readyz``  — 200 once the controller has completed its first pass as leader, or
  knows it is a standby replica (readiness: the controller is doing its job), and the
  readiness gate allows it (``ratefit run``: the watch-fed cache has synced, while leading).

Metric names follow the Prometheus naming guide (prometheus.io/docs/practices/naming:
``_total`` for counters, base units such as ``_seconds``, a ``ratefit_controller_`` prefix).
"""

from __future__ import annotations

import threading
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any, Callable

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.exposition import CONTENT_TYPE_LATEST

from ratefit.controller.bounded_http import TEXT, Answer, GetServer, HttpLimits

__all__ = ["Telemetry", "HealthServer", "HttpLimits", "CpuSample", "PASS_BUCKETS", "RESIZE_BY"]

#: pass-duration buckets (seconds): a pass over a few policies takes milliseconds,
#: a pass over 10,000 workloads a few seconds (common practice, no source)
PASS_BUCKETS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)


#: label values of ``ratefit_controller_changes_total{resize_by}`` (the CRD's resizeBy)
RESIZE_BY = ("Rollout", "InPlace")
#: labels of the per-container CPU gauges. Not ``namespace``/``container``: a Kubernetes
#: scrape attaches those to every series for the controller's own pod
CPU_LABELS = ("workload_namespace", "workload", "workload_container")


@dataclass(frozen=True)
class CpuSample:
    """One sized container after a pass, per pod, in millicores (None: unknown)."""

    namespace: str
    workload: str  # Kind/name, e.g. Deployment/web
    container: str
    request_m: int | None
    demand_m: int | None
    demand_bound_m: int | None


class CpuCollector:
    """The per-container CPU gauges, replaced as one snapshot per pass:
    ``ratefit_controller_cpu_request_cores`` (the request now),
    ``ratefit_controller_cpu_demand_cores`` (the model's demand at the current rate) and
    ``ratefit_controller_cpu_demand_bound_cores`` (its upper band), per pod."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._samples: tuple[CpuSample, ...] = ()

    def replace(self, samples: Iterable[CpuSample]) -> None:
        snap = tuple(samples)
        with self._lock:
            self._samples = snap

    @staticmethod
    def _families() -> tuple[tuple[str, GaugeMetricFamily], ...]:
        """(CpuSample field, empty family) for each gauge."""
        return (
            ("request_m", GaugeMetricFamily(
                "ratefit_controller_cpu_request_cores",
                "CPU request of the container now, per pod (cores).", labels=CPU_LABELS)),
            ("demand_m", GaugeMetricFamily(
                "ratefit_controller_cpu_demand_cores",
                "CPU the container's model says it needs at its current rate, per pod (cores).", labels=CPU_LABELS)),
            ("demand_bound_m", GaugeMetricFamily(
                "ratefit_controller_cpu_demand_bound_cores",
                "Upper band of that demand (demandBound), per pod (cores).", labels=CPU_LABELS)),
        )

    def describe(self) -> Iterator[GaugeMetricFamily]:
        for _, fam in self._families():
            yield fam

    def collect(self) -> Iterator[GaugeMetricFamily]:
        with self._lock:
            snap = self._samples
        for field, fam in self._families():
            for s in snap:
                v = getattr(s, field)
                if v is not None:
                    fam.add_metric([s.namespace, s.workload, s.container], v / 1000.0)
            yield fam


class Telemetry:
    """The controller's metrics plus the health/readiness flags the server reports."""

    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry if registry is not None else CollectorRegistry(auto_describe=True)
        r = self.registry
        self.passes = Counter(
            "ratefit_controller_passes", "Reconcile passes finished, by outcome.", ["outcome"], registry=r
        )
        self.pass_duration = Histogram(
            "ratefit_controller_pass_duration_seconds",
            "Wall time of one reconcile pass.",
            buckets=PASS_BUCKETS,
            registry=r,
        )
        self.decisions = Counter(
            "ratefit_controller_decisions",
            "Container decisions, by verdict and reason.",
            ["verdict", "reason"],
            registry=r,
        )
        self.changes = Counter(
            "ratefit_controller_changes",
            "Changes applied to the cluster, by the policy's resizeBy: Rollout (one template patch) "
            "or InPlace (one pod resize).",
            ["resize_by"],
            registry=r,
        )
        for how in RESIZE_BY:  # both series exist from the start, so increase() sees the first change
            self.changes.labels(resize_by=how)
        self.patch_errors = Counter(
            "ratefit_controller_patch_errors",
            "Patches or resizes that failed, by error kind.",
            ["kind"],
            registry=r,
        )
        self.budget_left = Gauge(
            "ratefit_controller_budget_remaining",
            "Changes the global per-minute budget still allows at the end of the last pass.",
            registry=r,
        )
        self.rollout_slots_left = Gauge(
            "ratefit_controller_rollout_slots_remaining",
            "Concurrent rollouts still allowed at the end of the last pass.",
            registry=r,
        )
        self.rate_query_errors = Counter(
            "ratefit_controller_rate_query_errors",
            "Rate queries to the metrics source that failed, by kind: the error (e.g. "
            "PrometheusUnavailable, PromQLError; one per failed query) or NoMetrics (one per "
            "container left without a usable rate).",
            ["kind"],
            registry=r,
        )
        self.api_errors = Counter(
            "ratefit_controller_sizing_api_errors",
            "Failed calls to the sizing API, by error kind.",
            ["kind"],
            registry=r,
        )
        self.kube_errors = Counter(
            "ratefit_controller_kube_errors",
            "Failed Kubernetes API reads or status/event writes, by error kind.",
            ["kind"],
            registry=r,
        )
        self.status_writes = Counter(
            "ratefit_controller_status_writes",
            "SizingPolicy status writes, by outcome: written, or deferred (only figures such as the rate and "
            "demand moved, and the policy's were written less than --status-figures-every ago).",
            ["outcome"],
            registry=r,
        )
        for outcome in ("written", "deferred"):
            self.status_writes.labels(outcome=outcome)
        self.band_exceedance = Gauge(
            "ratefit_controller_band_exceedance_ratio",
            "Share of the container's recent CPU samples above its model's upper band (controller/staleness); "
            "well above 1 - coverage means the model is stale.",
            list(CPU_LABELS),
            registry=r,
        )
        self.models_stale = Gauge(
            "ratefit_controller_models_stale",
            "Containers whose model was marked stale in the last pass (significant band exceedance or a changed image).",
            registry=r,
        )
        self.leader = Gauge(
            "ratefit_controller_leader",
            "1 while this replica holds the leader Lease, else 0.",
            registry=r,
        )
        self.policies = Gauge(
            "ratefit_controller_policies",
            "SizingPolicies seen in the last pass, by validity.",
            ["state"],
            registry=r,
        )
        self.last_pass = Gauge(
            "ratefit_controller_last_pass_timestamp_seconds",
            "Unix time the last pass finished.",
            registry=r,
        )
        self.cpu = CpuCollector()
        r.register(self.cpu)
        self._lock = threading.Lock()
        self._ready = False
        self._alive: Callable[[], bool] = lambda: True
        self._gate: Callable[[], bool] = lambda: True
        self._gate_why = ""

    # -- the watch-fed cache ----------------------------------------------------------
    def watch_cache(self, stats: Callable[[], Any]) -> None:
        """Export the watch-fed cache's counters (``kube_cache.KubeCache.stats``) at each
        scrape: relists, 410 Gone answers, dropped streams, errors, events, objects held."""
        self.registry.register(_CacheCollector(stats))

    def set_readiness_gate(self, gate: Callable[[], bool], why: str = "") -> None:
        """``/readyz`` is 200 only while ``gate()`` is also True (``why``: the 503 text)."""
        self._gate = gate
        self._gate_why = why

    # -- health flags ---------------------------------------------------------------
    def set_ready(self, ready: bool) -> None:
        with self._lock:
            self._ready = bool(ready)

    @property
    def ready(self) -> bool:
        with self._lock:
            ready = self._ready
        return ready and self.gate_open

    @property
    def gate_open(self) -> bool:
        try:
            return bool(self._gate())
        except Exception:  # a broken gate means "not ready", never a crash of the server
            return False

    def set_liveness(self, probe: Callable[[], bool]) -> None:
        """``probe()`` says whether the loop is alive (e.g. its thread ``is_alive``)."""
        self._alive = probe

    @property
    def alive(self) -> bool:
        try:
            return bool(self._alive())
        except Exception:  # a broken probe means "not alive", never a crash of the server
            return False

    def set_cpu(self, samples: Iterable[CpuSample]) -> None:
        """Replace the per-container CPU gauges with this pass's view (the leader calls it
        after every pass; containers no longer sized disappear from /metrics)."""
        self.cpu.replace(samples)

    def render(self) -> bytes:
        """The registry in the Prometheus text exposition format."""
        return generate_latest(self.registry)

    def value(self, name: str, labels: dict[str, str] | None = None) -> float:
        """Current value of one sample (0.0 when absent) — for logs, the CLI and tests."""
        v = self.registry.get_sample_value(name, labels or {})
        return 0.0 if v is None else float(v)


#: counter name in the cache's stats → (metric name, help)
_CACHE_COUNTERS = {
    "lists": ("ratefit_controller_cache_lists", "LISTs the watch-fed cache made, by resource (the first one and relists)."),
    "relists": ("ratefit_controller_cache_relists", "LISTs after the first: 410 Gone, a watch error, the resync period."),
    "gone": ("ratefit_controller_cache_gone", "Watch positions the API server no longer had (410 Gone)."),
    "drops": ("ratefit_controller_cache_watch_drops", "Watch streams cut before the server ended them (resumed)."),
    "errors": ("ratefit_controller_cache_errors", "Failed LIST/WATCH requests and watch ERROR events."),
    "events": ("ratefit_controller_cache_events", "Watch events (ADDED/MODIFIED/DELETED) applied to the cache."),
    "bad_objects": ("ratefit_controller_cache_bad_objects", "Objects the cache could not read and left out."),
}


#: the cache's gauges (registered only by ``watch_cache``: ``ratefit run`` with the cache)
_CACHE_GAUGES = {
    "objects": ("ratefit_controller_cache_objects", "Objects held by the watch-fed cache."),
    "synced": ("ratefit_controller_cache_synced", "1 once the watch-fed cache has listed everything it follows."),
}


class _CacheCollector:
    """Reads the cache's counters at scrape time (no second copy of them to keep in step)."""

    def __init__(self, stats: Callable[[], Any]) -> None:
        self._stats = stats

    def describe(self) -> list[Any]:
        return []

    def collect(self) -> Any:
        snap = self._stats()
        families = {k: CounterMetricFamily(name, text, labels=["resource"]) for k, (name, text) in _CACHE_COUNTERS.items()}
        objects = GaugeMetricFamily(*_CACHE_GAUGES["objects"], labels=["resource"])
        for resource, st in sorted(snap.per_resource.items()):
            for key, fam in families.items():
                fam.add_metric([resource], float(getattr(st, key)))
            objects.add_metric([resource], float(st.objects))
        yield from families.values()
        yield objects
        yield GaugeMetricFamily(*_CACHE_GAUGES["synced"], value=1.0 if snap.synced else 0.0)


class HealthServer(GetServer):
    """Serves ``/metrics``, ``/healthz`` and ``/readyz`` for one :class:`Telemetry`.

    ``port=0`` picks a free port (read it back from :attr:`port`). Binds 127.0.0.1
    unless told otherwise; in a cluster pass ``host="0.0.0.0"`` so probes reach it.
    The server is bounded (:mod:`ratefit.controller.bounded_http`): a connection cap,
    a header deadline, header size and count limits, one request per connection.
    """

    def __init__(self, telemetry: Telemetry, *, host: str = "127.0.0.1", port: int = 0,
                 limits: HttpLimits | None = None) -> None:
        self.telemetry = telemetry
        tel = telemetry

        def healthz() -> Answer:
            ok = tel.alive
            return (200, b"ok\n", TEXT) if ok else (503, b"loop not running\n", TEXT)

        def readyz() -> Answer:
            if tel.ready:
                return 200, b"ok\n", TEXT
            why = b"not ready\n" if tel.gate_open or not tel._gate_why else f"not ready: {tel._gate_why}\n".encode()
            return 503, why, TEXT

        super().__init__({"/metrics": lambda: (200, tel.render(), CONTENT_TYPE_LATEST), "/healthz": healthz,
                          "/readyz": readyz}, host=host, port=port, limits=limits, name="ratefit-health",
                         not_found=b"not found: try /metrics, /healthz or /readyz\n")
