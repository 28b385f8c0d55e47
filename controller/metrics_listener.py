"""A second, metrics-only listener for `ratefit serve`.

The sizing API binds 127.0.0.1 inside the controller's pod: only the controller (and
`kubectl port-forward`) may ask it for demand. Prometheus, however, scrapes from another
pod, so the API's own ``/metrics`` was out of its reach and the sizing-API alerts of
``manifests/monitoring/`` could never fire. ``ratefit serve --metrics-port P
--metrics-host 0.0.0.0`` adds this listener: it answers ``GET /metrics`` (the same
registry the API's own route renders) and ``GET /healthz``, nothing else — no model,
no demand, no reload. The metric labels are route templates and reasons, never a model
key, so nothing of a tenant's workloads is exposed; no token is asked (Prometheus
scrapes metrics without one, common practice).

Built on :class:`ratefit.controller.bounded_http.GetServer` (connection cap, header
deadline and size limits, one request per connection), like the controller's health server.
"""

from __future__ import annotations

from collections.abc import Callable

from ratefit.controller.bounded_http import TEXT, GetServer, HttpLimits

__all__ = ["MetricsListener"]

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


class MetricsListener(GetServer):
    """Serves ``render()`` at ``/metrics`` on ``host:port`` (``port=0``: any free port)."""

    def __init__(self, render: Callable[[], bytes], *, host: str = "127.0.0.1", port: int = 0,
                 limits: HttpLimits | None = None) -> None:
        super().__init__({"/metrics": lambda: (200, render(), CONTENT_TYPE), "/healthz": lambda: (200, b"ok\n", TEXT)},
                         host=host, port=port, limits=limits, name="ratefit-api-metrics",
                         not_found=b"not found: this port serves only /metrics and /healthz\n")
