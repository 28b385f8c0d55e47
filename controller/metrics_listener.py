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

Built on :mod:`ratefit.controller.bounded_http` (connection cap, header deadline and size
limits, one request per connection), like the controller's health server.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

from ratefit.controller.bounded_http import BoundedHandler, BoundedHTTPServer, HttpLimits

__all__ = ["MetricsListener"]

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


class MetricsListener:
    """Serves ``render()`` at ``/metrics`` on ``host:port`` (``port=0``: any free port)."""

    def __init__(self, render: Callable[[], bytes], *, host: str = "127.0.0.1", port: int = 0,
                 limits: HttpLimits | None = None) -> None:
        class Handler(BoundedHandler):
            def do_GET(self) -> None:  # noqa: N802 - stdlib naming
                path = self.path.split("?", 1)[0]
                if path == "/metrics":
                    self._send(200, render(), CONTENT_TYPE)
                elif path == "/healthz":
                    self._send(200, b"ok\n")
                else:
                    self._send(404, b"not found: this port serves only /metrics and /healthz\n")

            def _send(self, code: int, body: bytes, ctype: str = "text/plain; charset=utf-8") -> None:
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

        self._server = BoundedHTTPServer((host, port), Handler, limits=limits)
        self._thread: threading.Thread | None = None

    @property
    def port(self) -> int:
        return int(self._server.server_address[1])

    @property
    def url(self) -> str:
        return f"http://{self._server.server_address[0]}:{self.port}"

    def start(self) -> MetricsListener:
        self._thread = threading.Thread(target=self._server.serve_forever, name="ratefit-api-metrics", daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        if self._thread is not None:
            self._thread.join(timeout=5)

    def __enter__(self) -> MetricsListener:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
