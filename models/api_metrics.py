"""The sizing API's own telemetry: Prometheus metrics (one registry per app) and the
ASGI middleware that counts, times and logs every request.

Each app gets its own ``CollectorRegistry`` (never prometheus_client's global default
one), so tests and benchmarks can build many apps in one process. Names follow the
Prometheus naming guide (prometheus.io, "Metric and label naming"): a ``ratefit_api_``
prefix, base units (seconds), ``_total`` on counters; the route label is the route
*template* (``/v1/models/{namespace}/{workload}/{container}/demand``), never the raw
path, so label cardinality stays bounded; unmatched paths count as ``<unmatched>``.

The middleware is plain ASGI (no per-request task or body copying) and also adds a
``Server-Timing: app;dur=<ms>`` header (W3C Server Timing) to every response, the
time from the request's arrival at the app to the start of the response: the
benchmark reads it to split server time from client and network time.

The access log is one JSON object per line on the ``ratefit.api.access`` logger:
time, method, route, path, status, duration, client. Never a body, a header or
the token.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.exposition import CONTENT_TYPE_LATEST, generate_latest

from ratefit.models.api_state import ApiState
from ratefit.models.store import REFUSAL_REASONS

__all__ = ["ApiMetrics", "TelemetryMiddleware", "CONTENT_TYPE_LATEST"]

#: request latency buckets, seconds: 0.25 ms … 2.5 s (the API answers in well under
#: a millisecond; batches of 50,000 take tens of milliseconds)
LATENCY_BUCKETS = (0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
_METHODS = frozenset({"GET", "POST", "HEAD", "PUT", "DELETE", "PATCH", "OPTIONS"})
UNMATCHED = "<unmatched>"


class ApiMetrics:
    """All metrics of one app, on its own registry."""

    def __init__(self, state: ApiState, *, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry if registry is not None else CollectorRegistry(auto_describe=True)
        r = self.registry
        self.requests = Counter(
            "ratefit_api_requests",
            "HTTP requests answered, by route template, method and status code.",
            ["route", "method", "status"],
            registry=r,
        )
        self.latency = Histogram(
            "ratefit_api_request_duration_seconds",
            "Time from a request's arrival at the app to the end of its response, by route template, method and status.",
            ["route", "method", "status"],
            buckets=LATENCY_BUCKETS,
            registry=r,
        )
        self.lookups = Counter(
            "ratefit_api_lookups",
            "Demand lookups answered (one per single request, one per batch item with a known key).",
            registry=r,
        )
        self.extrapolated = Counter(
            "ratefit_api_lookups_extrapolated",
            "Demand lookups whose rate lay outside the trained range of the model.",
            registry=r,
        )
        self.unknown = Counter(
            "ratefit_api_lookups_unknown_model",
            "Lookups for a key with no loaded model (404s and batch items with an error).",
            registry=r,
        )
        self.reloads = Counter(
            "ratefit_api_reloads",
            "Store (re)loads by result: ok, partial (some artifacts refused), failed (store unreadable).",
            ["result"],
            registry=r,
        )
        for result in ("ok", "partial", "failed"):
            self.reloads.labels(result)
        self.models_loaded = Gauge("ratefit_api_models_loaded", "Models being served.", registry=r)
        self.models_refused = Gauge(
            "ratefit_api_models_refused",
            "Store files refused at the last load, by reason (not_regular_file, too_large, unreadable, "
            "corrupt, absurd_values, wrong_place); each refusal is also a log line.",
            ["reason"],
            registry=r,
        )
        self.invalid = Counter(
            "ratefit_api_lookups_invalid",
            "Batch items answered with an error for their own input (a bad model key or rate), by reason.",
            ["reason"],
            registry=r,
        )
        self.connections_refused = Counter(
            "ratefit_api_connections_refused",
            "Connections refused or closed by the server's limits, by reason (header_bytes, header_count, "
            "request_timeout, max_connections).",
            ["reason"],
            registry=r,
        )
        self.store_loaded = Gauge(
            "ratefit_api_store_loaded_timestamp_seconds",
            "Unix time at which the store being served was loaded (0 before the first load).",
            registry=r,
        )

        def _snap_value(fn: Callable[[Any], float], default: float) -> Callable[[], float]:
            def value() -> float:
                snap = state.snapshot
                return default if snap is None else fn(snap)

            return value

        def _refused_for(reason: str) -> Callable[[Any], float]:
            return lambda s: float(sum(1 for x in s.refused if x.reason == reason))

        self.models_loaded.set_function(_snap_value(lambda s: float(len(s)), 0.0))
        for reason in REFUSAL_REASONS:
            self.models_refused.labels(reason).set_function(_snap_value(_refused_for(reason), 0.0))
        self.store_loaded.set_function(_snap_value(lambda s: s.loaded_at, 0.0))
        self._children: dict[tuple[str, str, int], tuple[Any, Any]] = {}

    def observe(self, route: str, method: str, status: int, seconds: float) -> None:
        key = (route, method, status)
        children = self._children.get(key)
        if children is None:  # labels() looks up a dict under a lock; cache the children
            s = str(status)
            children = (self.requests.labels(route, method, s), self.latency.labels(route, method, s))
            self._children[key] = children
        children[0].inc()
        children[1].observe(seconds)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)


class TelemetryMiddleware:
    """Counts, times and logs every HTTP request; adds ``Server-Timing``."""

    def __init__(self, app: Any, *, metrics: ApiMetrics, access_logger: str = "ratefit.api.access") -> None:
        self.app = app
        self.metrics = metrics
        self.log = logging.getLogger(access_logger)

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500  # what the client gets if the app fails before answering

        async def send_timed(message: dict[str, Any]) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                ms = (time.perf_counter() - started) * 1000.0
                headers = list(message.get("headers", ()))
                headers.append((b"server-timing", b"app;dur=%.3f" % ms))
                message = {**message, "headers": headers}
            await send(message)

        try:
            await self.app(scope, receive, send_timed)
        finally:
            seconds = time.perf_counter() - started
            route = scope.get("route")
            template = getattr(route, "path", None) or UNMATCHED
            method = scope.get("method", "")
            if method not in _METHODS:
                method = "other"
            self.metrics.observe(template, method, status, seconds)
            if self.log.isEnabledFor(logging.INFO):
                client = scope.get("client")
                self.log.info(
                    "%s %s %d",
                    method,
                    template,
                    status,
                    extra={
                        "access": {
                            "method": method,
                            "route": template,
                            "path": scope.get("path", ""),
                            "status": status,
                            "duration_ms": round(seconds * 1000.0, 3),
                            "client": f"{client[0]}:{client[1]}" if client else None,
                        }
                    },
                )
